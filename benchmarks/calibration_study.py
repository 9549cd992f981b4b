"""Which group features carry trust calibration across collections (issue 19's calibration study).

    python -m benchmarks.calibration_study --collect     # replay the protocol, keep every group's features
    python -m benchmarks.calibration_study               # leave-one-data-set-out evaluation (collects first if needed)

Collect: for each data set of benchmarks/calibration.py, the same protocol (first 50 groups cold; up to
15 groups accepted by the simulated annotator, a relearn, the next 50) through a real Project, keeping
each group's candidate features (measured on the graph in use), its purity and size, and the accepted
groups in order (the observations the calibrator learns from).
Evaluate: a prior fitted on some data sets is scored on the one left out, cold and warm (warm = the
isotonic map of core.calibration.Calibrator learned from that set's accepted groups), photo-weighted
|trust - purity| as benchmarks/calibration.py prints it.
"""
from __future__ import annotations

import argparse
import pickle
import tempfile
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.calibration import DATASETS, _accept_as_annotator, load, opened  # noqa: E402
from core import calibration  # noqa: E402

STORE = Path(tempfile.gettempdir()) / "kinfold-calibration-study.pkl"
CANDIDATES = ("entropy_rank", "pair_similarity", "log_size", "margin", "suggested",
              "pair_rank", "inside_share", "raw_trust", "fiedler", "min_loo", "std_loo", "clf_agree", "clf_conf")


def candidate_features(graph, idx, suggested: bool, margin, raw_trust: float) -> list[float]:
    base = calibration.group_features(graph, idx, suggested, margin)
    m = np.asarray(idx)
    ref = np.sort(graph.sims[:, :10].mean(1))
    pair_rank = float(np.searchsorted(ref, base[1]) / len(ref))
    k = min(10, len(m) - 1) if len(m) > 1 else 1
    inside = float(np.isin(graph.idx[m, :k], m).mean()) if len(m) > 1 else 1.0
    return list(base) + [pair_rank, inside, float(raw_trust)] + shape_features(graph.rows(m))


def label_features(prob, idx) -> list[float]:
    """clf_agree: share of members whose most probable label (relearned classifier) is the members' most
    common one; clf_conf: the members' mean top probability. 1.0 / 1.0 without a classifier."""
    if prob is None or len(idx) < 2:
        return [1.0, 1.0]
    p = np.nan_to_num(prob[np.asarray(idx)])
    top = p.argmax(1)
    return [float(np.bincount(top).max() / len(top)), float(p.max(1).mean())]


def shape_features(x) -> list[float]:
    """fiedler: the second-smallest eigenvalue of the members' normalised graph Laplacian (affinity
    max(cos, 0)^3, as proposals.split_members cuts): small when the group falls into two parts;
    min_loo / std_loo: the least and the spread of each member's similarity to the mean of the others."""
    x = np.asarray(x, np.float64)
    m = len(x)
    if m < 3:
        return [1.0, 1.0, 0.0]
    s = x @ x.T
    a = np.clip(s, 0, None) ** 3 + 1e-6
    np.fill_diagonal(a, 0.0)
    d = a.sum(1)
    lap = np.eye(m) - a / np.sqrt(d[:, None] * d[None, :])
    lam = np.linalg.eigvalsh(lap)
    rest = x.sum(0)[None, :] - x
    loo = (x * rest).sum(1) / np.maximum(np.linalg.norm(rest, axis=1), 1e-9)
    return [float(lam[1]), float(loo.min()), float(loo.std())]


def collect(names) -> dict:
    out = {}
    for name in names:
        feats, classes = load(name)
        with opened(feats, classes) as (project, truth, row_of):
            def rows_of(groups):
                graph = project.graph()
                names = project.label_arrays()[2]
                prob = project.label_classifier(names) if names else None
                rows = []
                for g in groups:
                    raw = project.store.proposal(g.id)
                    cls = [truth[m] for m in g.members]
                    sug = raw.suggested_label is not None
                    idx = [row_of[m] for m in g.members]
                    f = candidate_features(graph, idx, sug, raw.confidence, raw.trust) + label_features(prob, idx)
                    rows.append(dict(f=f, purity=calibration.purity(cls), size=len(cls), kind=g.kind,
                                     share=float(np.mean([c == raw.suggested_label for c in cls])) if sug else None))
                return rows
            cold = rows_of(project.propose(limit=50, hold=0))
            accepted, labelled = [], 0
            for _ in range(15):
                if labelled >= len(classes) / 2:
                    break
                gs = project.propose(limit=1, hold=1)
                if not gs:
                    break
                accepted += rows_of(gs)
                labelled += _accept_as_annotator(project, gs[0], truth)
            project.relearn()
            warm = rows_of(project.propose(limit=50, hold=0))
            # Accepted groups' features on the graph in use after the relearn (as Project.calibration measures).
            out[name] = dict(cold=cold, accepted=accepted, warm=warm)
        print(name, len(cold), len(accepted), len(warm), flush=True)
    STORE.parent.mkdir(parents=True, exist_ok=True)
    STORE.write_bytes(pickle.dumps(out))
    return out


def _arrays(rows, cols):
    x = np.array([[r["f"][CANDIDATES.index(c)] for c in cols] for r in rows])
    return x, np.array([r["purity"] for r in rows]), np.array([r["size"] for r in rows], float)


def fit(rows, cols):
    """A logistic prior over `cols` with fractional targets (as core.calibration.fit_prior), standardised
    on `rows`; returns the function from feature rows to the prior's figure."""
    from sklearn.linear_model import LogisticRegression

    x, y, w = _arrays(rows, cols)
    mu, sd = x.mean(0), np.maximum(x.std(0), 1e-3)
    z = (x - mu) / sd
    ww = np.r_[w * y, w * (1 - y)]
    keep = ww > 0
    lr = LogisticRegression(max_iter=2000).fit(np.vstack([z, z])[keep], np.r_[np.ones(len(z)), np.zeros(len(z))][keep],
                                              sample_weight=ww[keep])
    return lambda xn: 1.0 / (1.0 + np.exp(-(lr.intercept_[0] + ((xn - mu) / sd) @ lr.coef_[0])))


def error(trust, rows) -> float:
    """Photo-weighted |trust - purity|, a lone photo counted pure (as Calibrator.calibrate does)."""
    _, y, w = _arrays(rows, CANDIDATES[:1])
    return calibration.calibration_error(np.where(w == 1, 1.0, trust), y, w)


def warm(prior_fn, cols, data, decay: float, pseudo: float = calibration.PSEUDO_PHOTOS):
    """The warm groups' figures after core.calibration.Calibrator's map learned from the accepted groups."""
    cal = calibration.Calibrator(pseudo=pseudo, decay=decay)
    for q, r in zip(prior_fn(_arrays(data["accepted"], cols)[0]), data["accepted"]):
        cal.seen_trust.append((float(q), float(r["purity"]), int(r["size"])))
    return cal._map("trust", prior_fn(_arrays(data["warm"], cols)[0]))


FEATURE_SETS = {
    "shipped five": CANDIDATES[:5],
    "pair rank for pair similarity": ("entropy_rank", "pair_rank", "log_size", "margin", "suggested"),
    "+ pair rank": CANDIDATES[:5] + ("pair_rank",),
    "+ inside share": CANDIDATES[:5] + ("inside_share",),
    "+ pair rank, inside share, raw trust": CANDIDATES[:8],
    "+ fiedler": CANDIDATES[:5] + ("fiedler",),
    "+ min loo": CANDIDATES[:5] + ("min_loo",),
    "+ fiedler, min loo": CANDIDATES[:5] + ("fiedler", "min_loo"),
    "+ fiedler, min loo, std loo": CANDIDATES[:5] + ("fiedler", "min_loo", "std_loo"),
    "+ classifier agreement": CANDIDATES[:5] + ("clf_agree",),
    "+ classifier agreement, confidence": CANDIDATES[:5] + ("clf_agree", "clf_conf"),
    "+ classifier agreement, min loo": CANDIDATES[:5] + ("clf_agree", "min_loo"),
}


def evaluate(data: dict, decays=(1.0, 0.6)) -> None:
    """Leave one data set out: the prior fitted on the others, scored on it, cold and warm."""
    names = list(data)
    print(f"{'features':<38} {'held out':<14} {'cold':>6} {'prior':>6} " + " ".join(f"{'d=' + str(d):>6}" for d in decays))
    for label, cols in FEATURE_SETS.items():
        for test in names:
            rows = [r for n in names if n != test for st in ("cold", "accepted", "warm") for r in data[n][st]]
            pr = fit(rows, cols)
            d = data[test]
            figs = [error(pr(_arrays(d["cold"], cols)[0]), d["cold"]), error(pr(_arrays(d["warm"], cols)[0]), d["warm"])]
            figs += [error(warm(pr, cols, d, dec), d["warm"]) for dec in decays]
            print(f"{label:<38} {test:<14} " + " ".join(f"{v:6.3f}" for v in figs))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--collect", action="store_true", help="replay the protocol again (else reuse the last collection)")
    ap.add_argument("--datasets", default=",".join(DATASETS))
    args = ap.parse_args(argv)
    print("command: python -m benchmarks.calibration_study " + " ".join(sys.argv[1:] if argv is None else argv))
    data = collect(args.datasets.split(",")) if args.collect or not STORE.is_file() else pickle.loads(STORE.read_bytes())
    print("columns: cold; warm with the prior alone; warm with the map learned from the accepted groups, "
          "each later decision multiplying an earlier one's weight by d")
    evaluate(data)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
