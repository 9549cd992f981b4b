"""Labelling yield: photos given a confirmed label per annotator action, measured by replaying a
labelled data set through Kinfold with a simulated annotator who knows the true classes (the
protocol in the project's shared yield-protocol notes). The engine never sees the true classes.

    python -m benchmarks.yield_sim --dataset fashion --n 2000          # quick
    python -m benchmarks.yield_sim --dataset fashion --n 10000         # the figure that counts
    python -m benchmarks.yield_sim --dataset demo                       # the demo folder
    python -m benchmarks.yield_sim --dataset demo --extractor efficientnet-lite0-avg   # another embedding
    python -m benchmarks.yield_sim --dataset fashion --n 10000 --relearn   # with relearning every sitting

Prints yield@80, yield@100, suggested-label accuracy and timings for the engine and the baselines,
and writes the curves as CSV and PNG into --out (default out/yield/).
"""
from __future__ import annotations

import argparse
import csv
import json
import statistics
import sys
import time
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from core.project import Project  # noqa: E402
from core.proposals import FREE  # noqa: E402


@dataclass
class Run:
    name: str
    n: int
    curve: list[tuple[int, int]] = field(default_factory=lambda: [(0, 0)])   # (actions, labelled)
    suggested_right: int = 0
    suggested_total: int = 0
    propose_seconds: list[float] = field(default_factory=list)
    relearn_seconds: list[float] = field(default_factory=list)
    splits: int = 0
    groups: int = 0
    sittings: list[dict] = field(default_factory=list)    # geometry figures at each sitting's end
    steps: list[dict] = field(default_factory=list)       # one per annotator step: where the actions went

    def record(self, actions: int, labelled: int) -> None:
        self.curve.append((actions, labelled))

    def _first_at(self, share: float) -> tuple[int, int] | None:
        need = share * self.n
        return next(((a, l) for a, l in self.curve if l >= need - 1e-9 and a > 0), None)

    def yield_at(self, share: float) -> float:
        hit = self._first_at(share)
        return hit[1] / hit[0] if hit else float("nan")

    def actions_at(self, share: float) -> int | None:
        """Actions spent when `share` of the photos first carry a label (where the work goes)."""
        hit = self._first_at(share)
        return hit[0] if hit else None

    def summary(self) -> dict:
        out = dict(run=self.name, photos=self.n, actions=self.curve[-1][0],
                   yield80=round(self.yield_at(0.8), 3), yield100=round(self.yield_at(1.0), 3),
                   actions_at_20_40_60_80_100=[self.actions_at(q) for q in (0.2, 0.4, 0.6, 0.8, 1.0)],
                   groups=self.groups, splits=self.splits)
        if self.suggested_total:
            out["suggested_label_accuracy"] = round(self.suggested_right / self.suggested_total, 3)
        if self.propose_seconds:
            out["propose_median_s"] = round(statistics.median(self.propose_seconds), 4)
            out["propose_worst_s"] = round(max(self.propose_seconds), 4)
            out["propose_first_s"] = round(self.propose_seconds[0], 3)
        if self.relearn_seconds:
            out["relearn_s"] = [round(s, 1) for s in self.relearn_seconds]
        return out


def geometry_figures(project: Project, truth: dict[str, str], top: int = 100, settings=None) -> dict:
    """10-neighbour purity of the whole collection in the space proposals use (share of each photo's
    10 nearest other photos of its true class), and the purity of the top `top` proposed groups
    (share of their members in their group's majority class) with their mean size."""
    g = project.graph()
    y = np.array([truth.get(p, "") for p in project.photos()], dtype=object)
    idx = g.idx[:, :10]
    ok = idx >= 0
    hit = (y[np.maximum(idx, 0)] == y[:, None]) & ok
    purity = float(hit.sum() / max(ok.sum(), 1))
    # Over the photos still unlabelled: the relearned head was trained on the others' labels.
    free = project.label_arrays()[0] == FREE
    purity_free = float(hit[free].sum() / max(ok[free].sum(), 1)) if free.any() else float("nan")
    groups = project.propose(limit=top, hold=0, settings=settings)
    sizes = [len(gr.members) for gr in groups]
    kept = sum(Counter(truth[m] for m in gr.members).most_common(1)[0][1] for gr in groups)
    return dict(labelled=project.status().labelled, purity10=round(purity, 4),
                purity10_unlabelled=round(purity_free, 4),
                top_groups=len(groups), top_group_purity=round(kept / max(sum(sizes), 1), 4),
                top_group_size=round(float(np.mean(sizes)), 1) if sizes else 0.0)


def majority(classes: list[str]) -> str:
    counts = Counter(classes)
    top = max(counts.values())
    # A tie goes to the class of the anchor (the first member).
    return classes[0] if counts[classes[0]] == top else next(c for c in classes if counts[c] == top)


def simulate(project: Project, truth: dict[str, str], *, sitting: int = 100, relearn: bool = False,
             allow_split: bool = True, name: str = "kinfold", relearn_seconds: float | None = None,
             max_actions: int | None = None, settings=None) -> Run:
    """The yield protocol's annotator on `project`; `settings`: core.proposals.Settings for propose."""
    photos = [p for p in project.photos() if p in truth]
    run = Run(name, len(photos))
    used: set[str] = set(project.status().by_label)
    actions = 0
    labelled = project.status().labelled
    next_relearn = sitting
    while labelled < len(photos):
        t0 = time.perf_counter()
        groups = project.propose(limit=3, hold=1, settings=settings)
        run.propose_seconds.append(time.perf_counter() - t0)
        if not groups:
            break
        g = groups[0]
        classes = [truth[m] for m in g.members]
        m = majority(classes)
        minority = sum(c != m for c in classes)
        step = dict(kind=g.kind, size=len(g.members), sitting=len(run.sittings), take_outs=0, typed=0,
                    accepts=0, splits=0, suggested=g.suggested_label is not None)
        if allow_split and g.splittable and minority / len(classes) >= 0.3:
            project.split(g.id)
            actions += 1
            run.splits += 1
            step["splits"] = 1
        else:
            drop = [p for p, c in zip(g.members, classes) if c != m]
            actions += len(drop) + 1
            step.update(take_outs=len(drop), accepts=1)
            if m not in used and g.suggested_label != m:
                actions += 1   # typing a new label name
                step["typed"] = 1
            if g.suggested_label is not None:
                run.suggested_total += 1
                run.suggested_right += g.suggested_label == m
            used.add(m)
            project.accept(g.id, m, drop=drop)
            labelled += len(g.members) - len(drop)
            run.groups += 1
            step["confirmed"] = len(g.members) - len(drop)
        step.update(actions=actions, labelled=labelled)
        run.steps.append(step)
        run.record(actions, labelled)
        if actions >= next_relearn:
            # The end of a sitting: geometry figures before and (with relearning) after the relearn.
            row = dict(actions=actions, before=geometry_figures(project, truth, settings=settings))
            if relearn:
                t0 = time.perf_counter()
                project.relearn(seconds=relearn_seconds)
                run.relearn_seconds.append(time.perf_counter() - t0)
                row["after"] = geometry_figures(project, truth, settings=settings)
            run.sittings.append(row)
            next_relearn = actions + sitting
        if max_actions and actions >= max_actions:
            break
    # Photos never proposed are labelled one at a time.
    remaining = len(photos) - labelled
    for _ in range(remaining):
        actions += 1
        labelled += 1
        run.record(actions, labelled)
    return run


def kmeans_baseline(features: np.ndarray, classes: list[str], seed: int = 0) -> Run:
    """k-means groups (k = n/16) on the same embeddings, in random order, same annotator."""
    import faiss

    from core.neighbours import prepare

    x = prepare(features)
    n = len(x)
    k = max(1, n // 16)
    km = faiss.Kmeans(x.shape[1], k, niter=20, seed=seed, spherical=True, verbose=False)
    km.train(x)
    _, assign = km.index.search(x, 1)
    rng = np.random.default_rng(seed)
    run = Run("k-means groups, random order", n)
    actions = labelled = 0
    used: set[str] = set()
    for c in rng.permutation(k):
        members = np.nonzero(assign[:, 0] == c)[0]
        if len(members) == 0:
            continue
        cls = [classes[i] for i in members]
        m = majority(cls)
        wrong = sum(x != m for x in cls)
        actions += wrong + 1 + (m not in used)
        used.add(m)
        labelled += len(cls) - wrong
        run.groups += 1
        run.record(actions, labelled)
    for _ in range(n - labelled):   # removed photos, one at a time
        actions += 1
        labelled += 1
        run.record(actions, labelled)
    return run


def one_at_a_time(n: int) -> Run:
    run = Run("one photo at a time", n)
    run.record(n, n)
    run.curve = [(a, a) for a in range(n + 1)]
    return run


def write_outputs(runs: list[Run], out: Path, tag: str) -> None:
    out.mkdir(parents=True, exist_ok=True)
    with open(out / f"{tag}-curves.csv", "w", newline="") as f:
        w = csv.writer(f)
        w.writerow(["run", "actions", "labelled"])
        for r in runs:
            for a, l in r.curve:
                w.writerow([r.name, a, l])
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        return
    fig, ax = plt.subplots(figsize=(7, 4.5), dpi=120)
    for r in runs:
        a, l = zip(*r.curve)
        ax.plot(a, l, label=f"{r.name} (yield@80 {r.yield_at(0.8):.2f})")
    ax.axhline(0.8 * runs[0].n, color="grey", lw=0.8, ls="--")
    ax.set_xlabel("annotator actions")
    ax.set_ylabel("photos labelled")
    ax.set_title(f"Labelling yield — {tag}")
    ax.legend(fontsize=8)
    ax.set_xlim(0, min(max(r.curve[-1][0] for r in runs), runs[0].n))
    fig.tight_layout()
    fig.savefig(out / f"{tag}-curves.png")
    plt.close(fig)


def prepare_dataset(args) -> tuple[Path, dict[str, str], Path | None]:
    if args.dataset == "fashion":
        from benchmarks.fashion import write_fashion_folder

        folder = Path(args.work) / f"fashion-{args.n}"
        truth_file = folder.parent / f"fashion-{args.n}-truth.json"
        if not truth_file.exists():
            truth = write_fashion_folder(folder, args.n)
            truth_file.write_text(json.dumps(truth))
        return folder, json.loads(truth_file.read_text()), None
    if args.dataset == "demo":
        from app.demo import load_demo_truth

        truth = {p: c for p, c in load_demo_truth(ROOT / "resources" / "demo_truth.csv").items()
                 if c != "broken"}
        # The committed folder stays clean: the store for this run lives in the work directory.
        return ROOT / "sample_images", truth, Path(args.work) / "demo-store"
    raise SystemExit(f"unknown dataset {args.dataset}")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--dataset", choices=["fashion", "demo"], default="fashion")
    ap.add_argument("--n", type=int, default=2000)
    ap.add_argument("--work", default=str(Path.home() / ".cache" / "kinfold-bench" / "yield"))
    ap.add_argument("--out", default=str(ROOT / "out" / "yield"))
    ap.add_argument("--relearn", action="store_true", help="also run with relearning every sitting")
    ap.add_argument("--sitting", type=int, default=100)
    ap.add_argument("--no-split", action="store_true")
    ap.add_argument("--order", choices=["engine", "calibrated"], default=None,
                    help="group order (core.proposals.Settings.order; default: the engine's default)")
    ap.add_argument("--backdrop", type=int, default=None, metavar="K",
                    help="switch on the backdrop correction with K backdrop groups (Project.backdrop_correction)")
    ap.add_argument("--extractor", default="efficientnet-lite0",
                    help="the project's extractor (core.embedding.get_extractor names, e.g. efficientnet-lite0-avg); "
                         "a store per embedding, so runs of two never re-embed each other's")
    args = ap.parse_args(argv)

    print("command:", "python -m benchmarks.yield_sim " + " ".join(argv if argv is not None else sys.argv[1:]))
    folder, truth, store = prepare_dataset(args)
    base_store = Path(store) if store else folder.parent / (folder.name + "-store")
    base_store = base_store.with_name(base_store.name + _store_suffix(args.extractor))
    runs: list[Run] = []
    configs = [("kinfold, no relearning", False)] + ([("kinfold, relearning", True)] if args.relearn else [])
    for name, relearn in configs:
        store_dir = base_store.with_name(base_store.name + ("-relearn" if relearn else ""))
        p = Project.open(folder, store=store_dir, annotator="simulated", extractor=args.extractor)
        t0 = time.perf_counter()
        rep = p.scan()
        scan_s = time.perf_counter() - t0
        print(f"scan: {rep.photos} photos, {rep.embedded} embedded now, {len(rep.skipped)} skipped, {scan_s:.1f} s")
        _reset_decisions(p)
        if args.backdrop:
            t0 = time.perf_counter()
            info = p.backdrop_correction(args.backdrop)
            print(f"backdrop correction: {args.backdrop} groups of {info['sizes']} photos, "
                  f"{time.perf_counter() - t0:.1f} s")
        else:
            p.backdrop_correction(None)
        settings = None
        if args.order:
            from core.proposals import Settings

            settings = Settings(order=args.order)
        run = simulate(p, truth, sitting=args.sitting, relearn=relearn, allow_split=not args.no_split, name=name,
                       settings=settings)
        runs.append(run)
        feats, paths = p._features, p.photos()
        p.close()
    classes = [truth[q] for q in paths]
    runs.append(kmeans_baseline(feats, classes))
    runs.append(one_at_a_time(len(paths)))
    tag = f"{args.dataset}-{len(paths)}" + ("" if args.extractor == "efficientnet-lite0" else f"-{args.extractor}")
    for r in runs:
        print(json.dumps(r.summary()))
    write_outputs(runs, Path(args.out), tag)
    for r in runs:
        if r.sittings:
            print(f"{r.name}: at each sitting's end (-> after relearning: purity10 (unlabelled), "
                  f"top-100 group purity (mean size))")
            for row in r.sittings:
                b, a = row["before"], row.get("after")
                line = (f"  actions {row['actions']:5d}  labelled {b['labelled']:5d}  "
                        f"purity10 {b['purity10']} (unlabelled {b['purity10_unlabelled']})  "
                        f"top-100 groups {b['top_group_purity']} (mean size {b['top_group_size']})")
                if a:
                    line += (f"  ->  {a['purity10']} ({a['purity10_unlabelled']})  "
                             f"{a['top_group_purity']} ({a['top_group_size']})")
                print(line)
    with open(Path(args.out) / f"{tag}-sittings.json", "w") as f:
        json.dump({r.name: r.sittings for r in runs if r.sittings}, f, indent=1)
    print(f"curves: {Path(args.out) / (tag + '-curves.csv')} and .png")
    return 0


def _store_suffix(extractor: str) -> str:
    """"" for the global-average EfficientNet-Lite0 (the stores this benchmark always kept), else a
    suffix naming the extractor's id."""
    from core.embedding import DEFAULT_EXTRACTOR, DEFAULT_POOLING, EFFICIENTNET_LITE0

    if extractor == DEFAULT_EXTRACTOR or extractor in EFFICIENTNET_LITE0:
        pooling = EFFICIENTNET_LITE0.get(extractor, DEFAULT_POOLING)
        return "" if pooling == "avg" else f"-lite0-{pooling}"
    return f"-{extractor}"


def _reset_decisions(p: Project) -> None:
    """Start each run from no labels: a fresh store would re-embed, so the labels are wiped instead."""
    with p.store.transaction() as db:
        for t in ("labels", "decisions", "proposals", "deferred", "rejections", "relearn_versions"):
            db.execute(f"DELETE FROM {t}")
    p.reload()                              # the tables changed behind the project's back


if __name__ == "__main__":
    raise SystemExit(main())
