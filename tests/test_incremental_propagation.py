"""Label propagation updated locally after each decision must equal the full recomputation.

Data: scikit-learn's bundled digits (1,797 images, 10 classes), its true classes used as the labels a
simulated annotator gives in batches, as Kinfold's decisions do."""
import numpy as np
from sklearn.datasets import load_digits

from core import incremental_propagation, neighbours, proposals


def _graph():
    x, y = load_digits(return_X_y=True)
    return neighbours.build_graph(x.astype(np.float32), k=16), y


def _full(graph, state, label_of, n_labels, s):
    """The diffusion written out as core/proposals.py computed it before it was kept up to date."""
    step = proposals._propagation_matrix(graph, s.propagation_k)
    y = incremental_propagation.seeds(state, label_of, n_labels, s.unknown_prior)
    f = y.copy()
    for _ in range(s.iterations):
        f = s.alpha * (step @ f) + (1 - s.alpha) * y
    return f / np.maximum(f.sum(1, keepdims=True), 1e-12)


def test_local_updates_match_the_full_diffusion_decision_after_decision():
    graph, truth = _graph()
    s = proposals.Settings()
    n = graph.n
    rng = np.random.default_rng(0)
    state = np.zeros(n, np.int8)
    label_of = np.full(n, -1, np.int64)
    # Every class gets one labelled photo first, so the label list (10 labels) stays the same.
    first = [int(np.flatnonzero(truth == c)[0]) for c in range(10)]
    state[first], label_of[first] = proposals.LABELLED, truth[first]
    assert np.array_equal(proposals.propagate(graph, state, label_of, 10, s), _full(graph, state, label_of, 10, s))
    cache = proposals._cache_of(graph)[("propagation", s.propagation_k, s.alpha, s.iterations, s.unknown_prior)]
    local = 0
    for step in range(60):
        free = np.flatnonzero(state == proposals.FREE)
        pick = rng.choice(free, size=min(len(free), int(rng.integers(1, 40))), replace=False)
        if step % 7 == 3:
            state[pick] = proposals.SET_ASIDE                 # set aside
        elif step % 11 == 5:
            back = np.flatnonzero(state == proposals.LABELLED)[:5]
            state[back], label_of[back] = proposals.FREE, -1  # cleared (undo)
            back = []
        else:
            state[pick], label_of[pick] = proposals.LABELLED, truth[pick]
        got = proposals.propagate(graph, state, label_of, 10, s)
        want = _full(graph, state, label_of, 10, s)
        local += cache.last_touched >= 0
        assert np.abs(got - want).max() < 1e-5
        free = state == proposals.FREE
        agree = (got[free, :10].argmax(1) == want[free, :10].argmax(1)).mean()
        assert agree == 1.0
    assert local > 50              # the updates were local, not recomputations


def test_a_new_label_recomputes_and_a_decision_touches_only_its_neighbourhood():
    graph, truth = _graph()
    s = proposals.Settings()
    n = graph.n
    state = np.zeros(n, np.int8)
    label_of = np.full(n, -1, np.int64)
    state[0], label_of[0] = proposals.LABELLED, 0
    proposals.propagate(graph, state, label_of, 1, s)
    cache = proposals._cache_of(graph)[("propagation", s.propagation_k, s.alpha, s.iterations, s.unknown_prior)]
    state[1], label_of[1] = proposals.LABELLED, 0
    proposals.propagate(graph, state, label_of, 1, s)
    assert 0 < cache.last_touched < n        # only photos within reach of photo 1 changed
    state[2], label_of[2] = proposals.LABELLED, 1
    got = proposals.propagate(graph, state, label_of, 2, s)
    assert cache.last_touched == -1          # two labels now: computed over everything
    assert np.array_equal(got, _full(graph, state, label_of, 2, s))
