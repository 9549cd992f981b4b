"""Fast replay of the yield simulator on cached features, through the product's own `Project`.

`benchmarks.yield_sim` scans a folder of PNG files (the backbone embeds every photo); this replay runs
the same simulated annotator (`benchmarks.yield_sim.simulate`) on a real `Project` whose store is
filled with the cached EfficientNet-Lite0 features of `benchmarks.fashion` (benchmarks/cached_project.py:
no photo is decoded), so variants can be compared in minutes with the engine's own verbs, store, label
state and relearning — no copy of them. Those features are computed from the decoded arrays, not from
a scan of the PNG folder, and differ from a scan's in the last bits; the runs are chaotic (one different
group early changes everything after), so compare variants within this tool and quote `yield_sim` for
the product.

    python -m benchmarks.yield_replay --n 10000                       # no relearning, relearning, k-means
    python -m benchmarks.yield_replay --n 10000 --variants relearn    # one variant
    python -m benchmarks.yield_replay --n 10000 --variants relearn --breakdown   # where the actions go
    python -m benchmarks.yield_replay --n 10000 --extractor efficientnet-lite0-avg   # another embedding
    python -m benchmarks.fashion --split train --n 60000 && \
    python -m benchmarks.yield_replay --split train --offset 20000 --variants relearn   # another disjoint set of 10,000

Prints yield@80, yield@100 and timings per variant, and writes the curves (CSV and PNG) and the
per-sitting purity figures into --out (default out/yield/).
"""
from __future__ import annotations

import argparse
import json
import sys
import time
import shutil
import tempfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.fashion import CLASS_NAMES, fashion_features  # noqa: E402
from benchmarks.yield_sim import kmeans_baseline, one_at_a_time, simulate, write_outputs  # noqa: E402
from benchmarks.cached_project import build_project  # noqa: E402
from core import proposals, relearning  # noqa: E402
from core.project import Project  # noqa: E402


class Variant:
    """A `Project` with a variant's settings passed to its verbs (`propose(settings=)`,
    `relearn(settings=)`); everything else is the project itself."""

    def __init__(self, project: Project, relearn_settings=None, propose_settings=None):
        self.project = project
        self.relearn_settings = relearn_settings or relearning.Settings()
        self.propose_settings = propose_settings

    def __getattr__(self, name):
        return getattr(self.project, name)

    def propose(self, limit: int = 20, hold: int | None = None, settings=None):
        return self.project.propose(limit=limit, settings=settings or self.propose_settings, hold=hold)

    def relearn(self, seconds: float | None = None) -> dict:
        return self.project.relearn(seconds=seconds, settings=self.relearn_settings)


VARIANTS = {
    "none": dict(relearn=False),
    "relearn": dict(relearn=True),                                          # the default: label classifier
    "relearn+head": dict(relearn=True, settings=relearning.Settings(head=True)),   # and the projection head
    "unbalanced": dict(relearn=True, settings=relearning.Settings(classifier_balanced=False)),
    "no-rejections": dict(relearn=True, settings=relearning.Settings(classifier_rejections=False)),
    "rejections-weight-1": dict(relearn=True, settings=relearning.Settings(classifier_rejection_weight=1.0)),
    "rejections-weight-10": dict(relearn=True, settings=relearning.Settings(classifier_rejection_weight=10.0)),
    "no-smoothing": dict(relearn=True, propose=proposals.Settings(smoothing=0.0)),
    # A stronger label classifier on the same features (issue 19): less L2 (C 10), or an MLP on top.
    "c-3": dict(relearn=True, settings=relearning.Settings(classifier_c=3.0)),
    "c-10": dict(relearn=True, settings=relearning.Settings(classifier_c=10.0)),
    "c-30": dict(relearn=True, settings=relearning.Settings(classifier_c=30.0)),
    "mlp-64": dict(relearn=True, settings=relearning.Settings(classifier_hidden=64)),
    "c-10+mlp-64": dict(relearn=True, settings=relearning.Settings(classifier_c=10.0, classifier_hidden=64)),
    # Member trimming: photos below member_min never share a probable-label group with surer ones.
    "trim-0.8": dict(relearn=True, propose=proposals.Settings(member_min=0.8)),
    "trim-0.9": dict(relearn=True, propose=proposals.Settings(member_min=0.9)),
    "c-10+trim-0.9": dict(relearn=True, settings=relearning.Settings(classifier_c=10.0),
                          propose=proposals.Settings(member_min=0.9)),
    "c-10+conf-0.8": dict(relearn=True, settings=relearning.Settings(classifier_c=10.0),
                          propose=proposals.Settings(min_confidence=0.8)),
    # The tool offering no split at all (the protocol's step 5 is "if the tool offers split"):
    # the instrumentation showed split parts as the costliest photos (--breakdown).
    "no-split": dict(relearn=True, split=False),
    "group-128": dict(relearn=True, propose=proposals.Settings(max_group=128)),
    # Whitened classifier input (relearning.whitening): k principal components at unit variance.
    "whiten-128": dict(relearn=True, settings=relearning.Settings(classifier_whiten=128)),
    "whiten-128+c-10": dict(relearn=True, settings=relearning.Settings(classifier_whiten=128, classifier_c=10.0)),
    "whiten-256": dict(relearn=True, settings=relearning.Settings(classifier_whiten=256)),
    "c-10+group-128": dict(relearn=True, settings=relearning.Settings(classifier_c=10.0),
                           propose=proposals.Settings(max_group=128)),
}


def where_actions_go(run, share: float = 0.8) -> dict:
    """How the actions up to `share` of the photos labelled split into accepts, take-outs, typed
    labels, splits and single-photo groups, by group kind and by sitting (from `Run.steps`)."""
    need = share * run.n
    steps = []
    for st in run.steps:
        steps.append(st)
        if st["labelled"] >= need - 1e-9:
            break

    def tally(rows) -> dict:
        singles = [r for r in rows if r["size"] == 1 and r["accepts"]]
        out = dict(steps=len(rows), photos=sum(r.get("confirmed", 0) for r in rows),
                   actions=sum(r["accepts"] + r["take_outs"] + r["typed"] + r["splits"] for r in rows),
                   accepts=sum(r["accepts"] for r in rows) - len(singles), take_outs=sum(r["take_outs"] for r in rows),
                   typed=sum(r["typed"] for r in rows), splits=sum(r["splits"] for r in rows), singles=len(singles))
        out["yield"] = round(out["photos"] / max(out["actions"], 1), 2)
        out["mean_size"] = round(float(np.mean([r["size"] for r in rows])), 1) if rows else 0.0
        return out

    kinds = sorted({r["kind"] for r in steps})
    by_sitting = {}
    for r in steps:
        by_sitting.setdefault(r["sitting"], []).append(r)
    # Probable-label groups by size band: where their take-outs are.
    bands = {"1": (1, 1), "2-15": (2, 15), "16-47": (16, 47), "48-95": (48, 95), "96+": (96, 10 ** 9)}
    prob = [r for r in steps if r["kind"] == "probable label"]
    return dict(share=share, total=tally(steps), by_kind={k: tally([r for r in steps if r["kind"] == k]) for k in kinds},
                probable_by_size={b: tally([r for r in prob if lo <= r["size"] <= hi]) for b, (lo, hi) in bands.items()},
                by_sitting={s: tally(rows) for s, rows in sorted(by_sitting.items())})


def print_breakdown(b: dict) -> None:
    cols = ["steps", "photos", "actions", "accepts", "take_outs", "typed", "splits", "singles", "yield", "mean_size"]
    print(f"where the actions go, up to {int(b['share'] * 100)} % labelled:")
    print("  " + "".ljust(22) + "".join(c.rjust(10) for c in cols))
    rows = [("total", b["total"])] + [(k, v) for k, v in b["by_kind"].items()] + \
           [(f"probable, size {k}", v) for k, v in b["probable_by_size"].items()] + \
           [(f"sitting {k}", v) for k, v in b["by_sitting"].items()]
    for name, t in rows:
        print("  " + str(name).ljust(22) + "".join(str(t[c]).rjust(10) for c in cols))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", type=int, default=10000)
    ap.add_argument("--variants", default="none,relearn", help=f"comma-separated, from {sorted(VARIANTS)}")
    ap.add_argument("--sitting", type=int, default=100)
    ap.add_argument("--split", default="t10k", choices=["t10k", "train"],
                    help="Fashion-MNIST split (train: its first --n photos, a second data set to check settings on)")
    ap.add_argument("--offset", type=int, default=0,
                    help="skip this many photos of the split first: the training split holds six disjoint sets of "
                         "10,000 (--split train --offset 10000, 20000, ...), to measure the spread between runs")
    ap.add_argument("--breakdown", action="store_true",
                    help="print where the actions up to 80 %% go (accepts, take-outs, typed labels, singles; by group kind and sitting)")
    ap.add_argument("--out", default=str(ROOT / "out" / "yield"))
    ap.add_argument("--extractor", default="efficientnet-lite0",
                    help="whose cached features (benchmarks.fashion --extractor), e.g. efficientnet-lite0-gem")
    args = ap.parse_args(argv)
    print("command: python -m benchmarks.yield_replay " + " ".join(sys.argv[1:] if argv is None else argv))
    feats, labels = fashion_features(args.offset + args.n, args.extractor, split=args.split)
    feats, labels = feats[args.offset:], labels[args.offset:]
    classes = [CLASS_NAMES[int(c)] for c in labels]
    runs, breakdowns = [], {}
    for v in args.variants.split(","):
        spec = VARIANTS[v]
        t0 = time.perf_counter()
        work = Path(tempfile.mkdtemp(prefix="kinfold-replay-"))
        try:
            project, truth = build_project(work, feats, classes, annotator="simulated")
            with project:
                run = simulate(Variant(project, spec.get("settings"), spec.get("propose")), truth,
                               sitting=args.sitting, relearn=spec["relearn"], name=f"kinfold, {v}",
                               allow_split=spec.get("split", True))
        finally:
            shutil.rmtree(work, ignore_errors=True)
        runs.append(run)
        print(json.dumps(run.summary() | dict(seconds=round(time.perf_counter() - t0, 1))), flush=True)
        if args.breakdown:
            b = where_actions_go(run)
            print_breakdown(b)
            breakdowns[run.name] = b
    runs.append(kmeans_baseline(feats, classes))
    runs.append(one_at_a_time(args.n))
    for r in runs[-2:]:
        print(json.dumps(r.summary()))
    tag = f"replay-fashion-{args.split}-{args.n}" + (f"-from{args.offset}" if args.offset else "") + ("" if args.extractor == "efficientnet-lite0" else f"-{args.extractor}")
    write_outputs(runs, Path(args.out), tag)
    with open(Path(args.out) / f"{tag}-sittings.json", "w") as f:
        json.dump({r.name: r.sittings for r in runs if r.sittings}, f, indent=1)
    if breakdowns:
        with open(Path(args.out) / f"{tag}-breakdown.json", "w") as f:
            json.dump(breakdowns, f, indent=1)
    print(f"curves: {Path(args.out) / (tag + '-curves.csv')} and .png")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
