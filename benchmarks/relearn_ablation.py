"""What each part of relearning does to the embedding, measured on Fashion-MNIST (Debian's
dataset-fashion-mnist, test split) with EfficientNet-Lite0 features.

    python -m benchmarks.relearn_ablation                       # n = 2000 and 10000, every case
    python -m benchmarks.relearn_ablation --n 2000 --cases random200 --configs default,backbone
    python -m benchmarks.relearn_ablation --n 2000 --second-view   # also with a second real view

Figure: 10-neighbour purity (share of each photo's 10 nearest other photos, in the geometry the
proposals use, i.e. after neighbours.prepare, that share its true class), over the whole
collection, over photos still unlabelled, and over photos of classes that carry no label at all
(the "5 of 10 classes labelled" case: has relearning collapsed unseen classes into seen ones?).
Labels are given to a random sample of photos (seed fixed); the engine never sees other classes.
Relearn wall time is printed for every configuration; run at n = 10000 for the budget check.
--second-view embeds a mirrored central crop of every photo (core.embedding.second_view, one more
backbone pass, cached) and adds configurations that use it as augmentation.
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

from core import neighbours, relearning  # noqa: E402
from core.relearning import Settings  # noqa: E402

BASE = Settings()
CONFIGS = {
    "backbone": None,                                                          # no relearning
    "head untrained": replace(BASE, supervised=False, neighbourhood=False),    # principal directions only
    "supervised, head only": replace(BASE, keep_original=0.0),
    "default": BASE,                                                           # supervised + original kept
    "supervised + mlp": replace(BASE, hidden=256),
    "neighbourhood only, head only": replace(BASE, supervised=False, neighbourhood=True, keep_original=0.0),
    "neighbourhood only": replace(BASE, supervised=False, neighbourhood=True),
    "supervised + neighbourhood": replace(BASE, neighbourhood=True),
}
SHORT = {"backbone": "backbone", "untrained": "head untrained", "sup-head": "supervised, head only",
         "default": "default", "mlp": "supervised + mlp", "nb-head": "neighbourhood only, head only",
         "nb": "neighbourhood only", "sup+nb": "supervised + neighbourhood"}
SECOND_VIEW = {"default + second view": BASE,
               "neighbourhood only, head only + second view": CONFIGS["neighbourhood only, head only"]}
CASES = ("random200", "random300", "random1000", "5of10")


def second_view_features(n: int) -> np.ndarray:
    """Backbone embeddings of the second view of the first n test photos, cached like the first."""
    from PIL import Image

    from benchmarks.fashion import CACHE_DIR, load_fashion_mnist
    from core.embedding import embed_images, get_extractor, second_view

    extractor = get_extractor("efficientnet-lite0")
    path = CACHE_DIR / f"fashion-t10k-{extractor.id.replace(':', '_')}-n{n}-second-view.npy"
    if path.is_file():
        return np.load(path)
    images, _ = load_fashion_mnist(n)
    feats = embed_images((second_view(Image.fromarray(im, "L").convert("RGB")) for im in images), extractor)
    path.parent.mkdir(parents=True, exist_ok=True)
    np.save(path, feats)
    return feats


def purity(x: np.ndarray, y: np.ndarray, k: int = 10) -> np.ndarray:
    """Per photo: share of its k nearest other photos (cosine, x already prepared) of its class."""
    _, idx = neighbours.knn(x, k)
    return (y[idx] == y[:, None]).mean(1)


def make_state(y: np.ndarray, case: str, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """(state, label_of) for a labelling case; label indices are the true classes of the labelled."""
    rng = np.random.default_rng(seed)
    n = len(y)
    if case.startswith("random"):
        pool = np.arange(n)
        m = int(case[len("random"):])
    elif case == "5of10":
        pool = np.nonzero(y < 5)[0]
        m = 300
    else:
        raise SystemExit(f"unknown case {case}")
    chosen = rng.choice(pool, size=min(m, len(pool)), replace=False)
    state = np.zeros(n, np.int8)
    label_of = np.full(n, -1, np.int64)
    state[chosen] = relearning.LABELLED
    label_of[chosen] = y[chosen]
    return state, label_of


def adapted(features: np.ndarray, state, label_of, settings: Settings | None, seconds: float, second=None):
    if settings is None:
        return features, 0.0, {}
    t0 = time.perf_counter()
    blob, figures = relearning.train_head(features, state, label_of, settings, seconds=seconds, second_view=second)
    out = relearning.apply(blob, features)
    return out, time.perf_counter() - t0, figures


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", default="2000,10000", help="collection sizes, comma separated")
    ap.add_argument("--cases", default=",".join(CASES))
    ap.add_argument("--configs", default=",".join(SHORT), help="short names: " + ",".join(SHORT))
    ap.add_argument("--seconds", type=float, default=relearning.DEFAULT_SECONDS, help="relearn budget")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--second-view", action="store_true", help="also measure a second real view")
    args = ap.parse_args(argv)
    print("command: python -m benchmarks.relearn_ablation " + " ".join(sys.argv[1:] if argv is None else argv))
    from benchmarks.fashion import fashion_features

    for n in [int(v) for v in args.n.split(",")]:
        feats, y = fashion_features(n)
        y = y.astype(np.int64)
        second = second_view_features(n) if args.second_view else None
        unknown = set(args.configs.split(",")) - set(SHORT)
        if unknown:
            raise SystemExit(f"unknown configuration {sorted(unknown)[0]}; choose from {','.join(SHORT)}")
        runs = [(SHORT[c], CONFIGS[SHORT[c]], None) for c in args.configs.split(",")]
        if second is not None:
            runs += [(name, s, second) for name, s in SECOND_VIEW.items()]
        for case in args.cases.split(","):
            state, label_of = make_state(y, case, args.seed)
            free = state == relearning.FREE
            unseen = ~np.isin(y, np.unique(y[state == relearning.LABELLED]))
            for name, s, views in runs:
                s = replace(s, seed=args.seed) if s is not None else None
                out, secs, fig = adapted(feats, state, label_of, s, args.seconds, views)
                p = purity(neighbours.prepare(out), y)
                row = dict(n=n, case=case, config=name, purity=round(float(p.mean()), 4),
                           purity_unlabelled=round(float(p[free].mean()), 4),
                           purity_unseen_classes=round(float(p[unseen].mean()), 4) if unseen.any() else None,
                           relearn_s=round(secs, 1), steps=fig.get("steps"), rounds=fig.get("rounds"))
                print(json.dumps(row), flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
