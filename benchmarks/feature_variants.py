"""Which embedding of the same EfficientNet-Lite0 backbone separates classes best (issue 19)?

    python -m benchmarks.feature_variants                                 # fashion 2,000, digits, demo
    python -m benchmarks.feature_variants --datasets fashion --n 2000 --seeds 3

One forward pass per photo (and one of its mirror image) keeps every pooled part the variants need:
the global average of the last stage (1280-d head, the product's embedding until now), its
generalised mean (GeM, p = 3), and the global average of the 112-, 192- and 320-channel block outputs.
The variants are built from those parts in numpy:

  avg            the head's global average (the old embedding)
  gem3           GeM p = 3 of the head instead of the average
  flip           mean of the photo's and its mirror's head average
  ml<C>[x w]     [head average, w * stage-C average], each part L2-normalised first
  ...+flip       the same parts averaged over the photo and its mirror first

For each variant and data set (features centred and L2-normalised, cosine):
  purity@10   share of each photo's 10 nearest neighbours that carry its class
  lr@K        logistic-regression accuracy (scikit-learn, C = 1) on the other photos when K random
              photos are labelled, mean over --seeds draws (K = 300 and 1000; on the demo's 340
              photos K = 50 and 150)

Data sets: Fashion-MNIST test first --n (Debian `dataset-fashion-mnist`), scikit-learn's digits
rendered to 32 x 32 (as benchmarks/calibration.py), the demo folder sample_images (its true classes
from resources/demo_truth.csv, "odd"/"broken"/"non_image" left out). Pooled parts are cached under
~/.cache/kinfold-bench/feature-variants/.
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.fashion import CACHE_DIR, load_fashion_mnist  # noqa: E402

WORK = CACHE_DIR / "feature-variants"
# Last block of the stages with 112, 192 and 320 output channels (STAGES in core/efficientnet_lite.py).
STAGE_BLOCKS = {112: 10, 192: 14, 320: 15}
LABELS = {"fashion": (300, 1000), "digits": (300, 1000), "demo": (50, 150)}
SKIP_DEMO = {"odd", "broken", "non_image"}


def _images(name: str, n: int):
    """(list of RGB PIL images, classes)."""
    from PIL import Image

    if name == "fashion":
        ims, y = load_fashion_mnist(n)
        return [Image.fromarray(im, "L").convert("RGB") for im in ims], [int(c) for c in y]
    if name == "digits":
        from sklearn.datasets import load_digits

        d = load_digits()
        return ([Image.fromarray((im * 255 / 16).astype(np.uint8), "L").resize((32, 32), Image.BILINEAR)
                 .convert("RGB") for im in d.images], [int(c) for c in d.target])
    if name == "demo":
        from app.demo import load_demo_truth
        from core.images import load_rgb

        truth = load_demo_truth(ROOT / "resources" / "demo_truth.csv")
        keep = sorted(p for p, c in truth.items() if c not in SKIP_DEMO)
        return [load_rgb(ROOT / "sample_images" / p, min_side=224) for p in keep], [truth[p] for p in keep]
    raise SystemExit(f"unknown data set {name}")


def pooled_parts(model, x):
    """Every pooled part of one batch: {name: (B, C) float32}."""
    import torch
    import torch.nn.functional as F

    out = {}
    with torch.inference_mode():
        x = x.contiguous(memory_format=torch.channels_last)
        x = F.relu6(model._bn0(model._conv_stem(x)))
        for i, block in enumerate(model._blocks):
            x = block(x)
            for c, b in STAGE_BLOCKS.items():
                if b == i:
                    out[f"s{c}"] = x.mean((2, 3))
        x = F.relu6(model._bn1(model._conv_head(x)))
        out["avg"] = x.mean((2, 3))
        out["gem3"] = x.clamp(min=1e-6).pow(3).mean((2, 3)).pow(1 / 3)
    return {k: v.float().numpy() for k, v in out.items()}


def parts(name: str, n: int) -> tuple[dict[str, np.ndarray], np.ndarray, float]:
    """Pooled parts of the photo (keys as pooled_parts) and of its mirror ("f:" + key), classes,
    and seconds per photo of the plain (no mirror) forward pass (0 when cached)."""
    WORK.mkdir(parents=True, exist_ok=True)
    cache = WORK / f"{name}-n{n}.npz"
    if cache.is_file():
        z = np.load(cache, allow_pickle=False)
        return {k: z[k] for k in z.files if k != "y"}, z["y"], 0.0
    import torch
    from PIL import Image

    from core.embedding import EfficientNetLiteExtractor

    ext = EfficientNetLiteExtractor("fp32")
    images, y = _images(name, n)
    acc: dict[str, list] = {}
    spent = 0.0
    for i in range(0, len(images), 32):
        chunk = images[i:i + 32]
        for prefix, views in (("", chunk), ("f:", [im.transpose(Image.Transpose.FLIP_LEFT_RIGHT) for im in chunk])):
            batch = torch.stack([ext.preprocess(im) for im in views])
            t0 = time.perf_counter()
            got = pooled_parts(ext._model, batch)
            if not prefix:
                spent += time.perf_counter() - t0
            for k, v in got.items():
                acc.setdefault(prefix + k, []).append(v)
    out = {k: np.concatenate(v) for k, v in acc.items()}
    y = np.asarray(y)
    np.savez(cache, y=y, **out)
    return out, y, spent / len(images)


def _unit(x: np.ndarray) -> np.ndarray:
    return x / np.maximum(np.linalg.norm(x, axis=1, keepdims=True), 1e-12)


def variant(p: dict[str, np.ndarray], spec: str) -> np.ndarray:
    """The features of a variant name (see the module docstring), before centring."""
    flip = spec.endswith("+flip")
    base = spec[:-5] if flip else spec

    def build(pre: str) -> np.ndarray:
        if base in ("avg", "gem3"):
            return p[pre + base]
        if base == "flip":
            return p[pre + "avg"]
        head, *rest = base.split("+")
        assert head.startswith("ml")
        pieces = [_unit(p[pre + "avg"])]
        for token in [head[2:], *rest]:
            c, _, w = token.partition("x")
            pieces.append(float(w or 1.0) * _unit(p[pre + f"s{c}"]))
        return np.concatenate(pieces, 1)

    if base == "flip" or flip:
        return (build("") + build("f:")) / 2
    return build("")


def prepared(x: np.ndarray) -> np.ndarray:
    """Centred and L2-normalised, as the neighbour graph uses them."""
    return _unit(x - x.mean(0)).astype(np.float32)


def purity_at(x: np.ndarray, y: np.ndarray, k: int = 10) -> float:
    s = x @ x.T
    np.fill_diagonal(s, -np.inf)
    nn = np.argpartition(-s, k, axis=1)[:, :k]
    return float((y[nn] == y[:, None]).mean())


def lr_accuracy(x: np.ndarray, y: np.ndarray, k: int, seeds: int) -> float:
    from sklearn.linear_model import LogisticRegression

    accs = []
    for seed in range(seeds):
        rng = np.random.default_rng(seed)
        idx = rng.permutation(len(y))
        tr, te = idx[:k], idx[k:]
        clf = LogisticRegression(C=1.0, max_iter=2000).fit(x[tr], y[tr])
        accs.append(float((clf.predict(x[te]) == y[te]).mean()))
    return float(np.mean(accs))


VARIANTS = ["avg", "gem3", "flip", "gem3+flip",
            "ml112", "ml192", "ml320", "ml112x0.5", "ml192x0.5", "ml320x0.5",
            "ml192+320", "ml112+320", "ml192x0.5+320x0.5", "ml112+flip", "ml192+flip", "ml320+flip"]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--datasets", default="fashion,digits,demo")
    ap.add_argument("--n", type=int, default=2000, help="Fashion-MNIST photos (the test split's first n)")
    ap.add_argument("--seeds", type=int, default=3, help="random label draws per logistic-regression figure")
    ap.add_argument("--variants", default=",".join(VARIANTS))
    args = ap.parse_args(argv)
    print("command: python -m benchmarks.feature_variants " + " ".join(sys.argv[1:] if argv is None else argv))
    names = args.variants.split(",")
    for ds in args.datasets.split(","):
        t0 = time.perf_counter()
        p, y, per_photo = parts(ds, args.n)
        n = len(y)
        ks = LABELS[ds]
        print(f"\n{ds}: {n} photos, {len(set(y.tolist()))} classes, parts ready in {time.perf_counter() - t0:.1f} s"
              + (f" (forward {1000 * per_photo:.1f} ms/photo)" if per_photo else " (cached)"))
        print(f"{'variant':<20} {'dim':>5} {'purity@10':>9} " + " ".join(f"{'lr@' + str(k):>7}" for k in ks))
        for v in names:
            x = prepared(variant(p, v))
            row = [purity_at(x, y)] + [lr_accuracy(x, y, k, args.seeds) for k in ks]
            print(f"{v:<20} {x.shape[1]:>5} {row[0]:>9.4f} " + " ".join(f"{r:>7.4f}" for r in row[1:]), flush=True)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
