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
from dataclasses import replace
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.fashion import CLASS_NAMES, fashion_features  # noqa: E402
from benchmarks.yield_sim import Run, kmeans_baseline, majority, one_at_a_time, write_outputs  # noqa: E402
from core import neighbours, proposals, relearning  # noqa: E402
from core.proposals import FREE, LABELLED  # noqa: E402


class Replay:
    """The state a Project keeps, as arrays: labels, rejections, split parts waiting first."""

    def __init__(self, features: np.ndarray, names: list[str], relearn_settings=None, propose_settings=None):
        self.features = features
        self.n = len(features)
        self.names = sorted(set(names))                       # Project sorts label names too
        self.state = np.zeros(self.n, np.int8)
        self.label_of = np.full(self.n, -1, np.int64)
        self.not_label = np.zeros((self.n, len(self.names)), bool)
        self.pinned: list[proposals.Group] = []
        self.graph = neighbours.build_graph(features)
        self.classifier: np.ndarray | None = None
        self.version: bytes | None = None
        self.relearn_settings = relearn_settings
        self.propose_settings = propose_settings

    def propose(self, limit: int = 3) -> list[proposals.Group]:
        out, taken = [], np.zeros(self.n, bool)
        for g in self.pinned:
            m = [i for i in g.members if self.state[i] == FREE and not taken[i]]
            if m:
                taken[m] = True
                out.append(replace(g, members=m))
        self.pinned = out
        used = sorted({int(c) for c in self.label_of[self.state == LABELLED]})
        # Project numbers only the labels in use; remap so group formation sees the same indices.
        remap = np.full(len(self.names), -1, np.int64)
        remap[used] = np.arange(len(used))
        lab = np.where(self.state == LABELLED, remap[np.maximum(self.label_of, 0)], -1)
        clf = None if self.classifier is None else self.classifier[:, used]
        if limit > len(out):
            groups = proposals.form_groups(self.graph, self.state, lab, len(used), limit - len(out), self.propose_settings,
                                           ~taken, self.not_label[:, used], clf)
            for g in groups:
                if g.suggested_label is not None:
                    g.suggested_label = used[g.suggested_label]
            out = out + groups
        return out[:limit]

    def accept(self, g: proposals.Group, label: int, drop: list[int]) -> None:
        keep = [i for i in g.members if i not in set(drop)]
        self.state[keep] = LABELLED
        self.label_of[keep] = label
        self.not_label[drop, label] = True
        self.pinned = [p for p in self.pinned if p is not g]

    def split(self, g: proposals.Group) -> None:
        part = proposals.split_members(self.graph.x[g.members])
        parts = [[m for m, p in zip(g.members, part) if p == k] for k in (0, 1)]
        if g.members[0] in parts[1]:
            parts.reverse()
        # The store keeps pinned groups in the order they were made: new parts go last.
        self.pinned = [p for p in self.pinned if p is not g] + [
            proposals.Group(pm, g.trust, "split part", g.suggested_label, g.confidence) for pm in parts if pm]

    def relearn(self) -> dict:
        """What Project.relearn does, on arrays: a new version (head and classifier), then the graph
        and the classifier probabilities of that version."""
        s = self.relearn_settings or relearning.Settings()
        names = self.names
        figures: dict = {}
        blob = None
        confirmed = np.where(self.state == LABELLED, self.label_of, -1)[self.state != FREE]
        if s.head and s.supervised and relearning._can_supervise(confirmed):
            blob, figures = relearning.train_head(self.features, self.state, self.label_of, s)
        clf = relearning.fit_classifier(self.features, self.state, self.label_of, names, c=s.classifier_c,
                                        balanced=s.classifier_balanced,
                                        not_label=self.not_label if s.classifier_rejections else None) \
            if s.classifier else None
        blob = relearning.attach_classifier(blob, clf)
        if blob is not None and relearning._load(blob) is not None:
            self.graph = neighbours.build_graph(relearning.apply(blob, self.features))
        self.classifier = None if clf is None else clf.probabilities(self.features, names)
        return figures

    def purity10(self, truth: np.ndarray) -> float:
        idx = self.graph.idx[:, :10]
        return float((truth[np.maximum(idx, 0)] == truth[:, None]).mean())


def simulate(rep: Replay, truth: np.ndarray, *, sitting: int = 100, relearn: bool = False,
             allow_split: bool = True, name: str = "replay", max_share: float = 1.0) -> Run:
    """The annotator of benchmarks.yield_sim.simulate, on a Replay. truth: class index per photo."""
    run = Run(name, rep.n)
    run.log = []      # (labelled before, kind, size, members not of the majority class, split?)
    used: set[int] = set()
    actions = labelled = 0
    next_relearn = sitting
    while labelled < rep.n and labelled < max_share * rep.n:
        t0 = time.perf_counter()
        groups = rep.propose(limit=3)
        run.propose_seconds.append(time.perf_counter() - t0)
        if not groups:
            break
        g = groups[0]
        classes = [int(truth[i]) for i in g.members]
        m = majority(classes)
        minority = sum(c != m for c in classes)
        split = allow_split and len(g.members) >= proposals.MIN_SPLIT and minority / len(classes) >= 0.3
        run.log.append((labelled, g.kind, len(g.members), minority, split))
        if split:
            rep.split(g)
            actions += 1
            run.splits += 1
        else:
            drop = [i for i, c in zip(g.members, classes) if c != m]
            actions += len(drop) + 1
            if m not in used and g.suggested_label != m:
                actions += 1
            if g.suggested_label is not None:
                run.suggested_total += 1
                run.suggested_right += g.suggested_label == m
            used.add(m)
            rep.accept(g, m, drop)
            labelled += len(g.members) - len(drop)
            run.groups += 1
        run.record(actions, labelled)
        if actions >= next_relearn:
            row = dict(actions=actions, labelled=labelled, purity10_before=round(rep.purity10(truth), 4))
            if relearn:
                t0 = time.perf_counter()
                rep.relearn()
                run.relearn_seconds.append(time.perf_counter() - t0)
                row["purity10_after"] = round(rep.purity10(truth), 4)
            run.sittings.append(row)
            next_relearn = actions + sitting
    for _ in range(rep.n - labelled):
        actions += 1
        labelled += 1
        run.record(actions, labelled)
    return run


VARIANTS = {
    "none": dict(relearn=False),
    "relearn": dict(relearn=True),                                          # the default: label classifier
    "relearn+head": dict(relearn=True, settings=relearning.Settings(head=True)),   # and the projection head
    "unbalanced": dict(relearn=True, settings=relearning.Settings(classifier_balanced=False)),
    "no-rejections": dict(relearn=True, settings=relearning.Settings(classifier_rejections=False)),
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
    truth = labels.astype(np.int64)
    # Label indices follow the sorted class names, as Project numbers labels.
    order = sorted(range(len(CLASS_NAMES)), key=lambda c: CLASS_NAMES[c])
    truth = np.argsort(order)[truth]
    names = sorted(CLASS_NAMES)
    runs = []
    for v in args.variants.split(","):
        spec = VARIANTS[v]
        t0 = time.perf_counter()
        rep = Replay(feats, names, spec.get("settings"), spec.get("propose"))
        run = simulate(rep, truth, sitting=args.sitting, relearn=spec["relearn"], name=f"kinfold, {v}")
        runs.append(run)
        print(json.dumps(run.summary() | dict(seconds=round(time.perf_counter() - t0, 1))), flush=True)
    runs.append(kmeans_baseline(feats, [names[c] for c in truth]))
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
