"""Why a better classifier offline does not raise the yield: the labels a sitting produces are the easy ones.

The annotator confirms the surest groups first, so the labelled photos are each class's easy core, not a
random sample. This fits the product's label classifier (`core.relearning.fit_classifier`: balanced,
L2 strength C) on Fashion-MNIST test 10,000 (generalised-mean features) twice for each size of the
labelled set: on random photos, and on the "easiest" ones (most of their 10 nearest neighbours in their
own class — what the first groups confirm), and prints the accuracy on the most confident half of the
other photos and on the next quarter (where the annotator works at 50-75 % labelled), for C 1 and 10.

    python -m benchmarks.labelled_bias [--sizes 3000,5000]
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.fashion import CLASS_NAMES, fashion_features  # noqa: E402
from core import neighbours, relearning  # noqa: E402


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--sizes", default="3000,5000")
    ap.add_argument("--extractor", default="efficientnet-lite0-gem")
    args = ap.parse_args(argv)
    print("command: python -m benchmarks.labelled_bias " + " ".join(sys.argv[1:] if argv is None else argv))
    x, y = fashion_features(10000, args.extractor, "t10k")
    n, names = len(y), list(CLASS_NAMES)
    _, idx = neighbours.knn(neighbours.prepare(x), 10)
    agree = (y[np.maximum(idx, 0)] == y[:, None]).mean(1)        # share of the 10 nearest in the own class
    rng = np.random.default_rng(0)
    print(f"{'labelled':>8} {'which':<8} {'C':>4} {'surest 50 %':>12} {'next 25 %':>10}")
    for size in (int(v) for v in args.sizes.split(",")):
        for which in ("random", "easiest"):
            lab = rng.choice(n, size, replace=False) if which == "random" else \
                np.argsort(-(agree + 1e-6 * rng.random(n)), kind="stable")[:size]
            state = np.zeros(n, np.int64)
            state[lab] = relearning.LABELLED
            label_of = np.where(state == relearning.LABELLED, y, -1)
            rest = np.flatnonzero(state != relearning.LABELLED)
            for c in (1.0, 10.0):
                p = relearning.fit_classifier(x, state, label_of, names, c=c).probabilities(x[rest], names)
                ok = p.argmax(1) == y[rest]
                order = np.argsort(-p.max(1), kind="stable")
                m = len(order)
                print(f"{size:>8} {which:<8} {c:>4g} {ok[order[:m // 2]].mean():>12.3f} "
                      f"{ok[order[m // 2:3 * m // 4]].mean():>10.3f}", flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
