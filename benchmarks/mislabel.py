"""How many planted label errors the likely-mistakes queue finds (core/mistakes.py).

    python -m benchmarks.mislabel                       # Fashion-MNIST 2,000 and the demo folder, seed 0
    python -m benchmarks.mislabel --n 2000 --rate 0.05 --seed 0 --datasets fashion,demo

Every photo is labelled with its true class (Fashion-MNIST: the data set's own classes, from Debian's
``dataset-fashion-mnist``; the demo folder: resources/demo_truth.csv), then `--rate` of them are
flipped to a random other class. Prints precision@100 (planted errors among the first 100 of the
queue) for each scorer against random order (expected: the error rate), how many of the planted
errors the first 100 hold, and precision at the number planted (on the demo folder's 17 errors every
scorer reaches the ceiling of precision@100, 0.17, so that column tells them apart). Fashion-MNIST runs the engine on the cached EfficientNet-Lite0 features with
the project's neighbour graph; the demo folder runs through `Project` (scan, label, relabel,
`likely_mistakes`) with a store under --work.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from core import mistakes, neighbours  # noqa: E402
from core.mistakes import precision_at  # noqa: E402

TOP = 100


def plant(truth: np.ndarray, n_labels: int, rate: float, rng: np.random.Generator) -> tuple[np.ndarray, set[int]]:
    """Labels with round(rate * n) of them flipped to a uniformly drawn other class; the flipped rows."""
    n = len(truth)
    wrong = rng.choice(n, size=int(round(rate * n)), replace=False)
    given = truth.copy()
    given[wrong] = (truth[wrong] + rng.integers(1, n_labels, size=len(wrong))) % n_labels
    return given, set(int(i) for i in wrong)


def report(name: str, ranked: dict[str, list[int]], wrong: set[int], n: int, seconds: dict[str, float],
           rng: np.random.Generator) -> None:
    shuffled = [int(i) for i in rng.permutation(n)]
    print(f"{name}: {n} photos, {len(wrong)} labels flipped ({len(wrong) / n:.1%}); "
          f"precision@{TOP} at best {min(len(wrong), TOP) / TOP:.2f}")
    k = len(wrong)
    print(f"  {'order':<12} {'precision@100':>13} {'errors caught':>14} {f'precision@{k}':>13} {'seconds':>8}")
    print(f"  {'random':<12} {precision_at(shuffled, wrong, TOP):>13.2f} "
          f"{sum(i in wrong for i in shuffled[:TOP]):>14d} {precision_at(shuffled, wrong, k):>13.2f} {'':>8}"
          f"   (expected {len(wrong) / n:.2f})")
    for method, order in ranked.items():
        caught = sum(i in wrong for i in order[:TOP])
        mark = "  <- default" if method == mistakes.METHOD else ""
        print(f"  {method:<12} {precision_at(order, wrong, TOP):>13.2f} {caught:>14d} "
              f"{precision_at(order, wrong, k):>13.2f} {seconds[method]:>8.1f}{mark}")


def run_fashion(n: int, rate: float, seed: int) -> None:
    from benchmarks.fashion import fashion_features
    from core.project import _GRAPH_SETTINGS

    feats, truth = fashion_features(n)
    truth = truth.astype(np.int64)
    rng = np.random.default_rng(seed)
    given, wrong = plant(truth, 10, rate, rng)
    graph = neighbours.build_graph(feats, **_GRAPH_SETTINGS)   # as a project builds it
    ranked, seconds = {}, {}
    for method in mistakes.METHODS:
        t0 = time.perf_counter()
        ranked[method] = [s.index for s in mistakes.rank(graph.x, given, graph.idx, method=method, seed=seed)]
        seconds[method] = time.perf_counter() - t0
    report(f"Fashion-MNIST {n} (t10k, EfficientNet-Lite0 features)", ranked, wrong, n, seconds, rng)


def run_demo(rate: float, seed: int, work: Path) -> None:
    from app.demo import load_demo_truth
    from core.project import Project

    truth = {p: c for p, c in load_demo_truth(ROOT / "resources" / "demo_truth.csv").items() if c != "broken"}
    p = Project.open(ROOT / "sample_images", store=work / "demo-store", annotator="benchmark")
    try:
        p.scan()
        with p.store.transaction() as db:   # start from no labels, every run
            for t in ("labels", "decisions", "proposals", "deferred", "rejections", "relearn_versions"):
                db.execute(f"DELETE FROM {t}")
        p.reload()                          # the tables changed behind the project's back
        paths = [q for q in p.photos() if q in truth]
        classes = sorted({truth[q] for q in paths})
        y = np.array([classes.index(truth[q]) for q in paths])
        rng = np.random.default_rng(seed)
        given, wrong_rows = plant(y, len(classes), rate, rng)
        for c in range(len(classes)):
            p.label([q for q, g in zip(paths, given) if g == c], classes[c])
        wrong = {p._index[paths[i]] for i in wrong_rows}   # rows of the project's photo list
        ranked, seconds = {}, {}
        for method in mistakes.METHODS:
            t0 = time.perf_counter()
            ranked[method] = [p._index[m.path] for m in p.likely_mistakes(limit=TOP, method=method)]
            seconds[method] = time.perf_counter() - t0
        report(f"demo folder ({len(classes)} classes, through Project)", ranked, wrong, len(p.photos()),
               seconds, rng)
    finally:
        p.close()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", type=int, default=2000, help="Fashion-MNIST photos (first n of t10k)")
    ap.add_argument("--rate", type=float, default=0.05, help="share of labels flipped")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--datasets", default="fashion,demo")
    ap.add_argument("--work", default=str(Path.home() / ".cache" / "kinfold-bench" / "mislabel"))
    args = ap.parse_args(argv)
    print("command: python -m benchmarks.mislabel " + " ".join(argv if argv is not None else sys.argv[1:]))
    sets = [s.strip() for s in args.datasets.split(",") if s.strip()]
    if "fashion" in sets:
        run_fashion(args.n, args.rate, args.seed)
    if "demo" in sets:
        run_demo(args.rate, args.seed, Path(args.work))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
