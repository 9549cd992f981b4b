"""Which group features carry trust calibration across collections (issue 19's calibration study).

    python -m benchmarks.calibration_study --collect     # replay the protocol, keep every group's features
    python -m benchmarks.calibration_study               # leave-one-data-set-out evaluation of priors

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
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.calibration import DATASETS, _accept_as_annotator, load, opened  # noqa: E402
from core import calibration  # noqa: E402

STORE = Path("/tmp/calib3/study.pkl")
CANDIDATES = ("entropy_rank", "pair_similarity", "log_size", "margin", "suggested",
              "pair_rank", "inside_share", "raw_trust")


def candidate_features(graph, idx, suggested: bool, margin, raw_trust: float) -> list[float]:
    base = calibration.group_features(graph, idx, suggested, margin)
    m = np.asarray(idx)
    ref = np.sort(graph.sims[:, :10].mean(1))
    pair_rank = float(np.searchsorted(ref, base[1]) / len(ref))
    k = min(10, len(m) - 1) if len(m) > 1 else 1
    inside = float(np.isin(graph.idx[m, :k], m).mean()) if len(m) > 1 else 1.0
    return list(base) + [pair_rank, inside, float(raw_trust)]


def collect(names) -> dict:
    out = {}
    for name in names:
        feats, classes = load(name)
        with opened(feats, classes) as (project, truth, row_of):
            def rows_of(groups):
                graph = project.graph()
                rows = []
                for g in groups:
                    raw = project.store.proposal(g.id)
                    cls = [truth[m] for m in g.members]
                    sug = raw.suggested_label is not None
                    idx = [row_of[m] for m in g.members]
                    f = candidate_features(graph, idx, sug, raw.confidence, raw.trust)
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
