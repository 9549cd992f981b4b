"""Fashion-MNIST from Debian's ``dataset-fashion-mnist`` package, as arrays, as a folder of
PNG photos, and as cached EfficientNet-Lite0 features.

    python -m benchmarks.fashion --n 10000      # compute (or reuse) the cached features

Features are cached under ~/.cache/kinfold-bench/ as two .npy files per (split, extractor, n):
``fashion-<split>-<extractor id>-n<N>-features.npy`` (float32, L2-normalised rows) and
``...-labels.npy`` (uint8 class numbers, see CLASS_NAMES).
"""
from __future__ import annotations

import argparse
import gzip
import sys
import time
from pathlib import Path

import numpy as np

DATA_DIR = Path("/usr/share/datasets/fashion-mnist")
CACHE_DIR = Path.home() / ".cache" / "kinfold-bench"
# Class order of the Fashion-MNIST label files (the data set's own documentation).
CLASS_NAMES = ["T-shirt/top", "Trouser", "Pullover", "Dress", "Coat",
               "Sandal", "Shirt", "Sneaker", "Bag", "Ankle boot"]
SPLIT_SIZE = {"t10k": 10000, "train": 60000}
_IDX_IMAGES, _IDX_LABELS = 2051, 2049  # IDX magic numbers: unsigned bytes, 3 / 1 dimensions


def _read_idx(path: Path, magic: int) -> np.ndarray:
    if not path.is_file():
        raise FileNotFoundError(
            f"Fashion-MNIST file {path} is missing: apt-get install dataset-fashion-mnist"
        )
    with gzip.open(path, "rb") as fh:
        raw = fh.read()
    header = np.frombuffer(raw, ">u4", count=1)[0]
    if header != magic:
        raise ValueError(f"{path} is not an IDX file of the expected kind (magic {header})")
    ndim = magic & 0xFF
    shape = tuple(int(v) for v in np.frombuffer(raw, ">u4", count=ndim, offset=4))
    return np.frombuffer(raw, np.uint8, offset=4 + 4 * ndim).reshape(shape)


def load_fashion_mnist(n: int | None = None, split: str = "t10k") -> tuple[np.ndarray, np.ndarray]:
    """The first ``n`` (default all) images (n, 28, 28) uint8 and labels (n,) uint8."""
    if split not in SPLIT_SIZE:
        raise ValueError(f"split must be one of {sorted(SPLIT_SIZE)}")
    images = _read_idx(DATA_DIR / f"{split}-images-idx3-ubyte.gz", _IDX_IMAGES)
    labels = _read_idx(DATA_DIR / f"{split}-labels-idx1-ubyte.gz", _IDX_LABELS)
    n = len(labels) if n is None else int(n)
    if not 0 < n <= len(labels):
        raise ValueError(f"n must be between 1 and {len(labels)} for split {split!r}")
    return images[:n].copy(), labels[:n].copy()


def write_fashion_folder(folder: Path, n: int, split: str = "t10k") -> dict[str, str]:
    """Write ``n`` photos as PNG into a few subfolders of ``folder``; names say nothing about
    the class. Returns {relative POSIX path: class name}."""
    from PIL import Image

    images, labels = load_fashion_mnist(n, split)
    folder = Path(folder)
    truth = {}
    for i, (img, label) in enumerate(zip(images, labels)):
        rel = f"roll{i % 4}/photo_{i:05d}.png"
        target = folder / rel
        target.parent.mkdir(parents=True, exist_ok=True)
        Image.fromarray(img, "L").save(target)
        truth[rel] = CLASS_NAMES[int(label)]
    return truth


def _cache_stem(split: str, extractor_id: str, n: int) -> Path:
    return CACHE_DIR / f"fashion-{split}-{extractor_id.replace(':', '_')}-n{n}"


def fashion_features(n: int | None = None, extractor_name: str = "efficientnet-lite0",
                     split: str = "t10k", precision: str = "auto") -> tuple[np.ndarray, np.ndarray]:
    """(n, dim) float32 L2-normalised features and (n,) labels, cached as .npy. A cache of
    the whole split also serves any smaller n (its first n rows)."""
    from core.embedding import (DEFAULT_EXTRACTOR, DEFAULT_POOLING, EFFICIENTNET_LITE0, efficientnet_lite_id,
                                embed_images, get_extractor)

    n = SPLIT_SIZE[split] if n is None else int(n)
    if extractor_name == DEFAULT_EXTRACTOR or extractor_name in EFFICIENTNET_LITE0:  # id known without the network
        extractor_id = efficientnet_lite_id(EFFICIENTNET_LITE0.get(extractor_name, DEFAULT_POOLING), precision)
        extractor = None
    else:
        extractor = get_extractor(extractor_name, precision)
        extractor_id = extractor.id
    for stem in (_cache_stem(split, extractor_id, n), _cache_stem(split, extractor_id, SPLIT_SIZE[split])):
        feats, labs = Path(f"{stem}-features.npy"), Path(f"{stem}-labels.npy")
        if feats.is_file() and labs.is_file():
            return np.load(feats)[:n], np.load(labs)[:n]

    from PIL import Image

    extractor = extractor or get_extractor(extractor_name, precision)
    images, labels = load_fashion_mnist(n, split)
    # Same pixels as decoding the PNGs write_fashion_folder writes (grey PNG -> RGB).
    features = embed_images((Image.fromarray(im, "L").convert("RGB") for im in images), extractor)
    stem = _cache_stem(split, extractor.id, n)
    stem.parent.mkdir(parents=True, exist_ok=True)
    np.save(f"{stem}-features.npy", features)
    np.save(f"{stem}-labels.npy", labels)
    return features, labels


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", type=int, default=10000)
    ap.add_argument("--split", default="t10k", choices=sorted(SPLIT_SIZE))
    ap.add_argument("--extractor", default="efficientnet-lite0")
    ap.add_argument("--precision", default="auto")
    args = ap.parse_args(argv)
    print("command: python -m benchmarks.fashion " + " ".join(sys.argv[1:] if argv is None else argv))
    t0 = time.perf_counter()
    feats, labels = fashion_features(args.n, args.extractor, args.split, args.precision)
    print(f"features {feats.shape} {feats.dtype}, labels {labels.shape}, {time.perf_counter() - t0:.1f} s")
    print("cache:", *sorted(str(p) for p in CACHE_DIR.glob(f"fashion-{args.split}-*.npy")), sep="\n  ")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
