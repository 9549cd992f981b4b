"""Trust calibration (core/calibration.py): the figure shown is the expected purity of the group.

External checks: Fashion-MNIST test 2,000 (Debian `dataset-fashion-mnist`)
with its true classes for the calibration error; scikit-learn's IsotonicRegression is the reference
the learned map must agree with; the scikit-image sample photos for the Project path.
"""
import numpy as np
import pytest

from core import calibration
from core.calibration import Calibrator, calibration_error, plain_words, reliability_table
from core.project import Project


def test_error_and_table_are_photo_weighted():
    # Two groups: 10 photos trust 0.9 purity 1.0, 30 photos trust 0.5 purity 0.7.
    err = calibration_error([0.9, 0.5], [1.0, 0.7], [10, 30])
    assert err == pytest.approx((10 * 0.1 + 30 * 0.2) / 40)
    rows = {r["bin"]: r for r in reliability_table([0.9, 0.5, 0.995], [1.0, 0.7, 0.5], [10, 30, 2])}
    assert rows["0.00-0.80"]["groups"] == 1 and rows["0.00-0.80"]["photos"] == 30
    assert rows["0.90-0.95"]["purity"] == pytest.approx(1.0)
    assert rows["0.99-1.00"]["groups"] == 1 and rows["0.80-0.90"]["groups"] == 0
    assert calibration.purity(["a", "b", "a", "a"]) == 0.75


def test_sampling_floor_matches_simulated_groups():
    # The floor is E|X / n - p| for X ~ Binomial(n, p); checked against groups drawn with numpy's
    # binomial sampler (an independent path from scipy's pmf the function sums).
    rng = np.random.default_rng(3)
    sizes, purities = [13, 96, 40, 5], [0.85, 0.95, 1.0, 0.6]
    drawn = [np.abs(rng.binomial(n, p, 200_000) / n - p).mean() for n, p in zip(sizes, purities)]
    expected = np.sum(np.multiply(sizes, drawn)) / np.sum(sizes)
    assert calibration.sampling_floor(purities, sizes) == pytest.approx(expected, abs=2e-3)
    assert calibration.sampling_floor([1.0, 1.0], [10, 96]) == 0.0
    # Small impure groups cannot meet the 0.05 goal even with a perfect figure.
    assert calibration.sampling_floor([0.85], [13]) > 0.05


def test_plain_words():
    assert plain_words(0.91) == "about 9 in 10 belong together"
    assert plain_words(0.99) == "nearly all belong together"
    assert plain_words(0.55) == "about 6 in 10 belong together"
    assert calibration.plain_label(0.78) == "about 8 in 10 carry it"


def _features(n, rng):
    f = np.tile(np.asarray(calibration.MEAN, float), (n, 1))
    f[:, 0] = rng.uniform(0, 1, n)          # entropy rank drives the prior
    return f


def test_learning_from_decisions_moves_trust_towards_observed_purity():
    """The annotator keeps finding groups 0.6 pure: the trust of such groups falls towards 0.6, a
    little after one decision (the prior holds PSEUDO_PHOTOS of weight), most of the way after many."""
    rng = np.random.default_rng(0)
    f = _features(200, rng)
    prior = calibration.prior(f, calibration.PRIOR_TRUST)
    cal = Calibrator()
    assert np.allclose(cal.trust(f), prior)          # before any decision: the prior
    cal.observe(f[0], 0.6, 10)
    one = cal.trust(f[:1])[0]
    assert 0.6 < one < prior[0] or prior[0] <= 0.6
    for row in f[1:60]:
        cal.observe(row, 0.6, 20)
    many = cal.trust(f[60:])
    assert np.abs(many - 0.6).mean() < np.abs(prior[60:] - 0.6).mean() / 2
    # Monotone in the prior's figure, as isotonic regression is.
    order = np.argsort(prior[60:])
    assert (np.diff(many[order]) >= -1e-9).all()


def test_isotonic_map_matches_scikit_learn_inside_the_seen_range():
    """With no pseudo-weight the learned map is scikit-learn's IsotonicRegression of observed purity
    on the prior figure (the reference)."""
    from sklearn.isotonic import IsotonicRegression

    rng = np.random.default_rng(1)
    f = _features(80, rng)
    y = rng.uniform(0.5, 1.0, 80)
    w = rng.integers(2, 30, 80)
    cal = Calibrator(pseudo=0.0, decay=1.0)
    for row, yi, wi in zip(f, y, w):
        cal.observe(row, yi, wi)
    p = calibration.prior(f, cal.trust_model)
    ref = IsotonicRegression(y_min=0, y_max=1, out_of_bounds="clip").fit(p, y, sample_weight=w).predict(p)
    assert np.allclose(cal.trust(f), ref, atol=1e-9)


def test_recent_decisions_weigh_more():
    """With RECENT_DECAY < 1 an observation's weight shrinks by that factor with each later accepted
    group: the map equals scikit-learn's IsotonicRegression with those weights (the reference), and after
    many 1.0-pure groups followed by a few 0.6-pure ones the figure sits nearer 0.6 than without decay."""
    from sklearn.isotonic import IsotonicRegression

    rng = np.random.default_rng(3)
    f = _features(40, rng)
    y = np.r_[np.ones(30), np.full(10, 0.6)]
    cal = Calibrator(pseudo=0.0, decay=0.7)
    flat = Calibrator(pseudo=0.0, decay=1.0)
    for row, yi in zip(f, y):
        cal.observe(row, yi, 10)
        flat.observe(row, yi, 10)
    p = calibration.prior(f, cal.trust_model)
    w = 10 * 0.7 ** np.arange(40)[::-1]
    ref = IsotonicRegression(y_min=0, y_max=1, out_of_bounds="clip").fit(p, y, sample_weight=w).predict(p)
    assert np.allclose(cal.trust(f), ref, atol=1e-9)
    probe = _features(50, np.random.default_rng(4))
    assert np.abs(cal.trust(probe) - 0.6).mean() < np.abs(flat.trust(probe) - 0.6).mean()


def test_pool_adjacent_violators_agrees_with_scikit_learn():
    """core.calibration.isotonic against scikit-learn's IsotonicRegression, ties in x included."""
    from sklearn.isotonic import IsotonicRegression

    rng = np.random.default_rng(2)
    x = np.round(rng.uniform(0, 1, 300), 2)          # many ties
    y = np.clip(x + rng.normal(0, 0.3, 300), 0, 1)
    w = rng.uniform(0.1, 5, 300)
    knots, fitted = calibration.isotonic(x, y, w)
    probe = np.linspace(-0.1, 1.1, 97)
    ref = IsotonicRegression(y_min=0, y_max=1, out_of_bounds="clip").fit(x, y, sample_weight=w).predict(probe)
    assert np.allclose(np.interp(probe, knots, fitted), ref, atol=1e-9)
    assert (np.diff(fitted) >= 0).all()


def test_fashion_mnist_2000_calibration_error(fashion_2000_named):
    """The calibration measurement of the yield protocol on Fashion-MNIST test 2,000 (true classes from
    the data set): photo-weighted |trust - purity| over the first 50 groups, cold and after 15 accepted
    groups and a relearn, through a real Project over the cached features (its own propose, accept,
    relearn and calibration). Measured: see README (benchmarks/calibration.py); the bounds leave margin."""
    from benchmarks.calibration import run

    res = run(*fashion_2000_named)
    cold, warm = res["cold"], res["warm"]
    print(f"cold {cold['error']:.3f} (raw {cold['raw_error']:.3f}), warm {warm['error']:.3f} "
          f"(raw {warm['raw_error']:.3f})")
    assert cold["error"] <= COLD_BOUND
    assert warm["error"] <= WARM_BOUND
    # Calibrated by bins: the reliability table's photo-weighted gap between bin trust and bin purity.
    assert cold["bin_gap"] <= BIN_GAP_BOUND and warm["bin_gap"] <= BIN_GAP_BOUND


# Measured (benchmarks/calibration.py through a real Project, this machine; the prior is fitted on
# Fashion-MNIST train + digits, so this set is held out), on the generalised-mean embedding with the
# prior refitted on it: cold 0.070, warm 0.129; bin gap 0.041 / 0.063 (average-pooled embedding and
# its prior: 0.086 / 0.103, 0.037 / 0.030; before that 0.096 / 0.136, 0.037 / 0.091). The per-group goal
# of 0.05 is not met (README "How honest the trust figure is").
COLD_BOUND = 0.11
WARM_BOUND = 0.15
BIN_GAP_BOUND = 0.08


def test_project_shows_calibrated_figures_and_keeps_the_order(photo_project_folder):
    """Project.propose shows calibrated figures; the stored ones (which rank the groups) stay the
    engine's; accepted groups become observations of the calibration."""
    with Project.open(photo_project_folder, annotator="tester") as p:
        groups = p.propose(limit=10)
        rows = {r.id: r for r in p.store.open_proposals()}
        # The order is the queue's, ranked on the stored (raw) figures: calibrating does not reorder.
        assert [g.id for g in groups] == p.store.get_setting("proposal_queue")["order"][:len(groups)]
        assert all(0.0 <= g.trust <= 1.0 for g in groups)
        assert any(abs(g.trust - rows[g.id].trust) > 1e-3 for g in groups)   # the shown figure is not the raw one
        cal = p.calibration()
        assert cal.observed_photos == 0
        g = groups[0]
        p.accept(g.id, "first", drop=g.members[-1:])
        cal = p.calibration()
        assert cal.observed_photos == len(g.members)
        assert cal.seen_trust[0][1] == pytest.approx((len(g.members) - 1) / len(g.members))
        # group() shows the same calibrated figure as propose().
        h = p.propose(limit=1)[0]
        assert p.group(h.id).trust == h.trust
        # An undone accept is no longer an observation.
        p.undo()
        assert p.calibration().observed_photos == 0
