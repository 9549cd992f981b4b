"""Ordering groups by the calibrated figures (core/calibrated_order.py, Settings.order).

External data: Fashion-MNIST test 2,000 (Debian `dataset-fashion-mnist`) features and true classes,
replayed through a real Project over the cached features (benchmarks/cached_project.py)."""
import numpy as np
import pytest

from core import calibrated_order, proposals
from core.proposals import Settings


def test_default_is_the_engine_order_and_bad_names_are_refused():
    assert Settings().order == calibrated_order.ENGINE
    with pytest.raises(ValueError, match="unknown group order 'best'"):
        calibrated_order.check("best")


def test_expected_yield_is_the_engines_formula_with_a_uniform_share():
    for n, t, sug in ((1, 1.0, False), (12, 0.9, True), (40, 0.62, False)):
        g = proposals.Group(list(range(n)), t, "new area", 0 if sug else None)
        assert calibrated_order.expected_yield(t, n, sug) == pytest.approx(
            proposals.expected_yield(g, np.full(n, t)))


def test_form_groups_ranks_by_the_rescored_figure(fashion_2000_named):
    """A rescore hook that prefers small groups turns the engine's order around."""
    from core.neighbours import build_graph

    feats, _ = fashion_2000_named
    graph = build_graph(feats[:600])
    state = np.zeros(600, np.int8)
    label_of = np.full(600, -1)
    s = Settings(explore_every=10 ** 6)

    def smallest_first(groups):
        for g in groups:
            g.extra["expected_yield"] = -len(g.members)

    plain = proposals.form_groups(graph, state, label_of, 0, 6, s)
    small = proposals.form_groups(graph, state, label_of, 0, 6, s, rescore=smallest_first)
    assert sorted(map(len, (g.members for g in small))) == [len(g.members) for g in small]
    assert sorted(tuple(g.members) for g in plain) == sorted(tuple(g.members) for g in small)


def _replay(project, truth, settings, steps):
    from benchmarks.yield_sim import majority

    seen = []
    for _ in range(steps):
        g = project.propose(limit=3, hold=1, settings=settings)[0]
        cls = [truth[m] for m in g.members]
        m = majority(cls)
        seen.append((tuple(g.members), g.trust))
        project.accept(g.id, m, drop=[q for q, c in zip(g.members, cls) if c != m])
    return seen


def test_engine_order_setting_changes_nothing(fashion_2000_named, tmp_path):
    """Settings(order="engine") gives the same groups, in the same order, as no settings (the yield
    curves of the default stay as they were)."""
    from benchmarks.cached_project import build_project

    feats, classes = fashion_2000_named
    runs = []
    for k, settings in enumerate((None, Settings(order="engine"))):
        p, truth = build_project(tmp_path / str(k), feats, classes, annotator="simulated")
        with p:
            runs.append(_replay(p, truth, settings, 20))
    assert runs[0] == runs[1]


def test_calibrated_order_ranks_by_calibrated_expected_photos_per_action(fashion_2000_named, tmp_path):
    """With order "calibrated", each batch the queue ranks comes in falling expected photos per action
    computed from the trust shown (the calibrated expected purity), before and after decisions; and
    the run differs from the engine's order."""
    from benchmarks.cached_project import build_project

    feats, classes = fashion_2000_named
    s = Settings(order="calibrated", explore_every=10 ** 6)
    p, truth = build_project(tmp_path / "c", feats, classes, annotator="simulated")
    with p:
        for step in range(3):
            groups = p.propose(limit=3, hold=0, settings=s)
            y = [calibrated_order.expected_yield(g.trust, len(g.members), g.suggested_label is not None)
                 for g in groups]
            assert len(groups) == 3
            assert all(a >= b - 2e-3 for a, b in zip(y, y[1:])), (step, y)
            _replay(p, truth, s, 8)
        assert any(g.kind == "probable label" for g in p.propose(limit=30, hold=0, settings=s))
    q, truth = build_project(tmp_path / "e", feats, classes, annotator="simulated")
    with q:
        engine = _replay(q, truth, Settings(order="engine", explore_every=10 ** 6), 10)
    p, truth = build_project(tmp_path / "c2", feats, classes, annotator="simulated")
    with p:
        calibrated = _replay(p, truth, s, 10)
    assert [m for m, _ in engine] != [m for m, _ in calibrated]
