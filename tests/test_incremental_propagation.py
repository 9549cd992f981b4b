"""Label propagation on the renumbered graph (core/incremental_propagation.py) must be bit for bit the
plain diffusion, decision after decision, and be reused while the seeds stay the same.

Data: scikit-learn's bundled digits (1,797 images, 10 classes), its true classes used as the labels a
simulated annotator gives in batches, as Kinfold's decisions do."""
import numpy as np
from sklearn.datasets import load_digits

from core import incremental_propagation, neighbours, proposals


def _graph():
    x, y = load_digits(return_X_y=True)
    return neighbours.build_graph(x.astype(np.float32), k=16), y


def _plain(graph, state, label_of, n_labels, s):
    """The diffusion written out as core/proposals.py computed it before (no renumbering, no cache)."""
    step = proposals._propagation_matrix(graph, s.propagation_k)
    y = incremental_propagation.seeds(state, label_of, n_labels, s.unknown_prior)
    f = y.copy()
    for _ in range(s.iterations):
        f = s.alpha * (step @ f) + (1 - s.alpha) * y
    return f / np.maximum(f.sum(1, keepdims=True), 1e-12)


def test_renumbered_diffusion_is_bit_for_bit_the_plain_one_decision_after_decision():
    graph, truth = _graph()
    s = proposals.Settings()
    n = graph.n
    rng = np.random.default_rng(0)
    state = np.zeros(n, np.int8)
    label_of = np.full(n, -1, np.int64)
    cache, fresh = None, 0
    for step in range(25):
        free = np.flatnonzero(state == proposals.FREE)
        pick = rng.choice(free, size=min(len(free), int(rng.integers(1, 60))), replace=False)
        if step % 7 == 3:
            state[pick] = proposals.SET_ASIDE
        elif step % 11 == 5:
            back = np.flatnonzero(state == proposals.LABELLED)[:5]
            state[back], label_of[back] = proposals.FREE, -1
        else:
            state[pick], label_of[pick] = proposals.LABELLED, truth[pick] % (2 + step // 5)
        n_labels = int(label_of.max()) + 1 if (label_of >= 0).any() else 0
        got = proposals.propagate(graph, state, label_of, n_labels, s)
        cache = proposals.derived(graph)[("propagation", s.propagation_k)]
        if cache.updates == 0:      # computed afresh: bit for bit the plain diffusion
            assert np.array_equal(got, _plain(graph, state, label_of, n_labels, s))
            fresh += 1
        else:                       # a decision's difference added: float32 rounding only
            assert np.abs(got - _plain(graph, state, label_of, n_labels, s)).max() < 1e-5
        assert not np.array_equal(cache.order, np.arange(n))          # the photos were renumbered
        again = proposals.propagate(graph, state.copy(), label_of.copy(), n_labels, s)
        assert again is got                                            # same seeds: not computed again
    assert sorted(cache.order.tolist()) == list(range(n))
    assert fresh >= 10


def test_other_settings_are_computed_afresh():
    graph, truth = _graph()
    state = np.zeros(graph.n, np.int8)
    label_of = np.full(graph.n, -1, np.int64)
    state[:20], label_of[:20] = proposals.LABELLED, truth[:20]
    a = proposals.propagate(graph, state, label_of, 10, proposals.Settings())
    b = proposals.propagate(graph, state, label_of, 10, proposals.Settings(alpha=0.5))
    assert np.array_equal(b, _plain(graph, state, label_of, 10, proposals.Settings(alpha=0.5)))
    assert not np.array_equal(a, b)


def test_with_many_labels_a_decision_diffuses_only_its_columns_and_matches_the_plain_diffusion():
    graph, truth = _graph()
    s = proposals.Settings()
    n = graph.n
    rng = np.random.default_rng(1)
    classes = truth + 10 * (np.arange(n) % 3)            # 30 labels: 31 columns
    state = np.zeros(n, np.int8)
    label_of = np.full(n, -1, np.int64)
    first = [int(np.flatnonzero(classes == c)[0]) for c in range(30)]
    state[first], label_of[first] = proposals.LABELLED, classes[first]
    proposals.propagate(graph, state, label_of, 30, s)
    cache = proposals.derived(graph)[("propagation", s.propagation_k)]
    updates = 0
    for step in range(40):
        c = int(rng.integers(0, 30))                      # one group accepted under one label
        free = np.flatnonzero((state == proposals.FREE) & (classes == c))
        pick = free[:int(rng.integers(1, 30))]
        state[pick], label_of[pick] = proposals.LABELLED, c
        got = proposals.propagate(graph, state, label_of, 30, s)
        updates += cache.updates > 0
        want = _plain(graph, state, label_of, 30, s)
        assert np.abs(got - want).max() < 1e-5            # float32 rounding only
        free = state == proposals.FREE
        assert (got[free, :30].argmax(1) == want[free, :30].argmax(1)).mean() > 0.999
    assert updates >= 30


def test_a_new_label_is_an_update_not_a_fresh_product_and_matches_the_plain_diffusion():
    # Names are kept sorted (core/label_state.py), so a new label can land between old ones and shift
    # their indices: the kept result must follow by name.
    graph, truth = _graph()
    s = proposals.Settings()
    n = graph.n
    state = np.zeros(n, np.int8)
    label_of = np.full(n, -1, np.int64)
    names: list[str] = []
    order = [7, 2, 9, 0, 5, 3, 8, 1, 6, 4]                 # digit classes in the order they are first labelled
    cache, widened = None, 0
    for step, c in enumerate(order * 2):
        pick = np.flatnonzero((state == proposals.FREE) & (truth == c))[:12]
        name = f"digit {c}"
        if name not in names:
            names = sorted(names + [name])
        given = np.array([int(truth[i]) for i in np.flatnonzero(state == proposals.LABELLED)])
        state[pick] = proposals.LABELLED
        label_of[:] = -1
        lab = np.flatnonzero(state == proposals.LABELLED)
        label_of[lab] = [names.index(f"digit {int(truth[i])}") for i in lab]
        got = proposals.propagate(graph, state, label_of, len(names), s, names)
        cache = proposals.derived(graph)[("propagation", s.propagation_k)]
        want = _plain(graph, state, label_of, len(names), s)
        assert np.abs(got - want).max() < 1e-5, step       # float32 rounding only
        if step > 0 and len(given):
            widened += cache.updates > 0
    assert widened >= 15                                   # new labels too went the update's way


def test_an_update_on_threads_is_bit_for_bit_the_update_one_column_after_another(monkeypatch):
    graph, truth = _graph()
    s = proposals.Settings()
    results = []
    for threaded_from in (10 ** 9, 0):              # never on threads, then always
        monkeypatch.setattr(incremental_propagation, "THREADED_FROM", threaded_from)
        cache = incremental_propagation.PropagationCache(proposals._propagation_matrix(graph, s.propagation_k))
        state = np.zeros(graph.n, np.int8)
        label_of = np.full(graph.n, -1, np.int64)
        first = [int(np.flatnonzero(truth == c)[0]) for c in range(10)]
        state[first], label_of[first] = proposals.LABELLED, truth[first]
        cache.get(state, label_of, 10, s)
        out = []
        for c in range(10):
            pick = np.flatnonzero((state == proposals.FREE) & (truth == c))[:20]
            state[pick], label_of[pick] = proposals.LABELLED, c
            out.append(cache.get(state, label_of, 10, s).copy())
            assert cache.updates == c + 1               # each decision an update, not a fresh product
        results.append(out)
    for a, b in zip(*results):
        assert np.array_equal(a, b)
