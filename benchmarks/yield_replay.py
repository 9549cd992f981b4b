"""Fast replay of the yield simulator on cached features, without a project store.

`benchmarks.yield_sim` drives a real `Project` (SQLite store, graph cache on disk); on Fashion-MNIST
10,000 with relearning that takes over an hour. This replay runs the same simulated annotator (the
rules in `benchmarks.yield_sim.simulate`) straight against `core.proposals` and `core.relearning`
on the cached EfficientNet-Lite0 features of `benchmarks.fashion`, so variants can be compared in
minutes. Those features are computed from the decoded arrays, not from a scan of the PNG folder, and
differ from a scan's in the last bits; the runs are chaotic (one different group early changes
everything after), so compare variants within this tool and quote `yield_sim` for the product.

    python -m benchmarks.yield_replay --n 10000                       # no relearning, relearning, k-means
    python -m benchmarks.yield_replay --n 10000 --variants relearn    # one variant

Prints yield@80, yield@100 and timings per variant, and writes the curves (CSV and PNG) and the
per-sitting purity figures into --out (default out/yield/).
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.fashion import CLASS_NAMES, fashion_features  # noqa: E402
from benchmarks.yield_sim import kmeans_baseline, one_at_a_time, simulate, write_outputs  # noqa: E402
from core import neighbours, proposals, relearning  # noqa: E402
from core.project import Proposal  # noqa: E402
from core.proposals import FREE, LABELLED  # noqa: E402


@dataclass
class _Status:
    labelled: int
    by_label: dict


class Replay:
    """A stand-in for core.project.Project over arrays: the verbs benchmarks.yield_sim.simulate
    calls (photos, status, propose, accept, split, relearn, graph), with the state a Project keeps
    (labels, "not this label" answers, split parts waiting first) and no store. Photos are row
    numbers; labels are names, numbered as Project numbers them (sorted, in use only)."""

    def __init__(self, features: np.ndarray, relearn_settings=None, propose_settings=None):
        self.features = features
        self.n = len(features)
        self.state = np.zeros(self.n, np.int8)
        self.label_name: list[str | None] = [None] * self.n
        self.rejected: list[set[str]] = [set() for _ in range(self.n)]
        self.pinned: list[Proposal] = []
        self.open: dict[int, Proposal] = {}
        self.next_id = 0
        self._graph = neighbours.build_graph(features)
        self.classifier: relearning.Classifier | None = None
        self.relearn_settings = relearn_settings or relearning.Settings()
        self.propose_settings = propose_settings

    # -- the verbs of Project that the simulator calls -------------------------------------------
    def photos(self) -> list[int]:
        return list(range(self.n))

    def status(self) -> _Status:
        names = [x for x in self.label_name if x is not None]
        return _Status(len(names), {k: names.count(k) for k in set(names)})

    def graph(self) -> neighbours.Graph:
        return self._graph

    def _state_arrays(self):
        names = sorted({x for x in self.label_name if x is not None})
        pos = {x: i for i, x in enumerate(names)}
        label_of = np.array([pos[x] if x is not None else -1 for x in self.label_name], np.int64)
        self._not_label = np.zeros((self.n, len(names)), bool)
        for i, rej in enumerate(self.rejected):
            for x in rej & pos.keys():
                self._not_label[i, pos[x]] = True
        return self.state.copy(), label_of, names

    def _group(self, members, trust, suggested, confidence, kind) -> Proposal:
        self.next_id += 1
        return Proposal(self.next_id, members, trust, suggested, confidence, kind)

    def propose(self, limit: int = 20) -> list[Proposal]:
        state, label_of, names = self._state_arrays()
        out, taken = [], np.zeros(self.n, bool)
        for g in self.pinned:
            m = [i for i in g.members if state[i] == FREE and not taken[i]]
            if m:
                taken[m] = True
                g.members = m
                out.append(g)
        self.pinned = out[:]
        if limit > len(out):
            clf = None if self.classifier is None else self.classifier.probabilities(self.features, names)
            groups = proposals.form_groups(self._graph, state, label_of, len(names), limit - len(out),
                                           self.propose_settings, ~taken, self._not_label, clf)
            out += [self._group(g.members, g.trust, None if g.suggested_label is None else names[g.suggested_label],
                                g.confidence, g.kind) for g in groups]
        self.open = {g.id: g for g in out}
        return out[:limit]

    def accept(self, group_id: int, label: str, drop=()) -> None:
        g = self.open.pop(group_id)
        drop = set(drop)
        for i in g.members:
            if i in drop:
                self.rejected[i].add(label)
            else:
                self.state[i], self.label_name[i] = LABELLED, label
        self.pinned = [p for p in self.pinned if p.id != group_id]

    def split(self, group_id: int) -> None:
        g = self.open.pop(group_id)
        part = proposals.split_members(self._graph.x[g.members])
        parts = [[m for m, p in zip(g.members, part) if p == k] for k in (0, 1)]
        if g.members[0] in parts[1]:
            parts.reverse()
        # The store keeps pinned groups in the order they were made: new parts go last.
        self.pinned = [p for p in self.pinned if p.id != group_id] + [
            self._group(pm, g.trust, g.suggested_label, g.confidence, "split part") for pm in parts if pm]

    def relearn(self, seconds: float | None = None) -> dict:
        """What core.relearning.relearn_project does, without a store: the label classifier and,
        with Settings.head, the projection head and its graph."""
        s = self.relearn_settings
        state, label_of, names = self._state_arrays()
        figures: dict = {}
        confirmed = np.where(state == LABELLED, label_of, -1)[state != FREE]
        if s.head and s.supervised and relearning._can_supervise(confirmed):
            blob, figures = relearning.train_head(self.features, state, label_of, s, seconds=seconds)
            self._graph = neighbours.build_graph(relearning.apply(blob, self.features))
        if s.classifier:
            self.classifier = relearning.fit_classifier(
                self.features, state, label_of, names, c=s.classifier_c, balanced=s.classifier_balanced,
                not_label=self._not_label if s.classifier_rejections else None,
                rejection_weight=s.classifier_rejection_weight)
        return figures


VARIANTS = {
    "none": dict(relearn=False),
    "relearn": dict(relearn=True),                                          # the default: label classifier
    "relearn+head": dict(relearn=True, settings=relearning.Settings(head=True)),   # and the projection head
    "unbalanced": dict(relearn=True, settings=relearning.Settings(classifier_balanced=False)),
    "no-rejections": dict(relearn=True, settings=relearning.Settings(classifier_rejections=False)),
    "rejections-weight-1": dict(relearn=True, settings=relearning.Settings(classifier_rejection_weight=1.0)),
    "no-smoothing": dict(relearn=True, propose=proposals.Settings(smoothing=0.0)),
}


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", type=int, default=10000)
    ap.add_argument("--variants", default="none,relearn", help=f"comma-separated, from {sorted(VARIANTS)}")
    ap.add_argument("--sitting", type=int, default=100)
    ap.add_argument("--split", default="t10k", choices=["t10k", "train"],
                    help="Fashion-MNIST split (train: its first --n photos, a second data set to check settings on)")
    ap.add_argument("--out", default=str(ROOT / "out" / "yield"))
    args = ap.parse_args(argv)
    print("command: python -m benchmarks.yield_replay " + " ".join(sys.argv[1:] if argv is None else argv))
    feats, labels = fashion_features(args.n, split=args.split)
    truth = {i: CLASS_NAMES[int(c)] for i, c in enumerate(labels)}
    runs = []
    for v in args.variants.split(","):
        spec = VARIANTS[v]
        t0 = time.perf_counter()
        rep = Replay(feats, spec.get("settings"), spec.get("propose"))
        run = simulate(rep, truth, sitting=args.sitting, relearn=spec["relearn"], name=f"kinfold, {v}")
        runs.append(run)
        print(json.dumps(run.summary() | dict(seconds=round(time.perf_counter() - t0, 1))), flush=True)
    runs.append(kmeans_baseline(feats, [truth[i] for i in range(len(feats))]))
    runs.append(one_at_a_time(args.n))
    for r in runs[-2:]:
        print(json.dumps(r.summary()))
    tag = f"replay-fashion-{args.split}-{args.n}"
    write_outputs(runs, Path(args.out), tag)
    with open(Path(args.out) / f"{tag}-sittings.json", "w") as f:
        json.dump({r.name: r.sittings for r in runs if r.sittings}, f, indent=1)
    print(f"curves: {Path(args.out) / (tag + '-curves.csv')} and .png")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
