"""Group formation details checked against outside references."""
import numpy as np
import pytest

from core import proposals


def _digits(classes, per_class):
    """scikit-learn's bundled digits (raw 8 x 8 pixels), a few of each class, centred and normalised."""
    from sklearn.datasets import load_digits

    d = load_digits()
    rows = np.concatenate([np.nonzero(d.target == c)[0][:k] for c, k in zip(classes, per_class)])
    x = d.data[rows].astype(np.float64)
    x -= x.mean(0)
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    return x, d.target[rows]


def test_split_matches_spectral_clustering_and_separates_classes():
    from sklearn.cluster import SpectralClustering
    from sklearn.metrics import adjusted_rand_score

    x, y = _digits((0, 1), (14, 9))
    part = proposals.split_members(x)
    # Outside reference: scikit-learn's spectral clustering on the same affinity.
    aff = np.clip(x @ x.T, 0, None) ** 3
    ref = SpectralClustering(2, affinity="precomputed", random_state=0).fit_predict(aff)
    assert adjusted_rand_score(ref, part) == pytest.approx(1.0)
    assert adjusted_rand_score(y, part) == pytest.approx(1.0)
    assert part[0] == 0          # the anchor's side comes first


def test_split_of_identical_members_still_gives_two_parts():
    x = np.tile(np.eye(4)[:1], (5, 1))
    part = proposals.split_members(x)
    assert sorted(set(part.tolist())) == [0, 1]


def _digits_five_labelled_per_class():
    """Graph, true classes, state and label indices: 30 digits of each class, raw pixels, the first
    five of each class labelled."""
    from core.neighbours import build_graph

    x, y = _digits(tuple(range(10)), (30,) * 10)
    g = build_graph(x.astype(np.float32), centre=False)
    state = np.zeros(len(y), np.int8)
    for c in range(10):
        state[np.nonzero(y == c)[0][:5]] = proposals.LABELLED
    return g, y, state, np.where(state == proposals.LABELLED, y, -1)


def test_groups_do_not_depend_on_the_order_of_label_names():
    """Renaming labels (which permutes their indices) must not change which groups come first:
    every label's candidates compete, not only the first labels in index order.
    Data: scikit-learn's bundled digits, raw pixels, five seeded labels per class."""
    g, y, state, label_of = _digits_five_labelled_per_class()
    perm = np.array([7, 3, 9, 0, 5, 1, 8, 2, 6, 4])          # label c is called perm[c]
    relabelled = np.where(label_of >= 0, perm[np.maximum(label_of, 0)], -1)
    for limit in (1, 3, 20):
        a = proposals.form_groups(g, state, label_of, 10, limit=limit)
        b = proposals.form_groups(g, state, relabelled, 10, limit=limit)
        assert [gr.members for gr in a] == [gr.members for gr in b]
        assert [None if gr.suggested_label is None else perm[gr.suggested_label] for gr in a] == \
               [gr.suggested_label for gr in b]
        members = [m for gr in a for m in gr.members]
        assert len(members) == len(set(members))      # a photo in at most one group


def test_member_trimming_keeps_less_sure_photos_out_of_the_surer_group():
    """`member_min`: a probable-label group takes only photos at least that sure while its label has
    any; the less sure ones come in groups of their own. Off (0), the groups are unchanged.
    Data: scikit-learn's bundled digits, raw pixels, five seeded labels per class; the classifier's
    probabilities are invented so each label has sure and less sure candidates."""
    g, y, state, label_of = _digits_five_labelled_per_class()
    rng = np.random.default_rng(0)
    sure = rng.uniform(0.6, 1.0, len(y))
    clf = np.full((len(y), 10), 0.0)
    clf[np.arange(len(y)), y] = sure
    clf[np.arange(len(y)), (y + 1) % 10] += 1 - sure
    base = proposals.Settings(smoothing=0.0, max_group=200)
    plain = proposals.form_groups(g, state, label_of, 10, limit=50, settings=base, classifier=clf)
    same = proposals.form_groups(g, state, label_of, 10, limit=50, classifier=clf,
                                 settings=proposals.Settings(smoothing=0.0, max_group=200, member_min=0.0))
    assert [gr.members for gr in plain] == [gr.members for gr in same]
    mixed = [gr for gr in plain if gr.kind == "probable label"]
    # The classifier's figure is scaled by the propagation's known mass: cut in the middle of what occurs.
    cut = float(np.median(np.concatenate([gr.extra["member_conf"] for gr in mixed])))
    assert any(min(gr.extra["member_conf"]) < cut <= max(gr.extra["member_conf"]) for gr in mixed)
    trimmed = proposals.form_groups(g, state, label_of, 10, limit=50, classifier=clf,
                                    settings=proposals.Settings(smoothing=0.0, max_group=200, member_min=cut))
    prob = [gr for gr in trimmed if gr.kind == "probable label"]
    assert any(min(gr.extra["member_conf"]) >= cut for gr in prob)
    for gr in prob:
        lo, hi = min(gr.extra["member_conf"]), max(gr.extra["member_conf"])
        assert lo >= cut or hi < cut, (lo, hi, cut)       # never sure and less sure photos together
    members = [m for gr in trimmed for m in gr.members]
    assert len(members) == len(set(members))
