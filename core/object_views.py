"""Features that weigh the object more than the backdrop: views of a photo and corrections computed
from the user's own collection only (no knowledge of the true backdrop).

* ``centre_crop(img, keep)`` — the central `keep` share of each side (the object is usually near the
  middle, the backdrop fills the edges);
* ``border_view(img, keep)`` — the photo with its central `keep` box painted over with the border's
  median colour: a view of the backdrop alone;
* ``remove_backdrop_clusters(features, backdrop, k)`` — group the photos by their backdrop view
  (spherical k-means on its features) and subtract each group's mean feature from its members (the
  per-backdrop mean, with the backdrop estimated, not known);
* ``project_out(features, backdrop, r)`` — remove from every feature the `r` main directions in which
  the backdrop views vary.

Measured by ``python -m benchmarks.backdrop`` (README, trust section): which of these, if any, the
engine uses is decided by the figures there.
"""
from __future__ import annotations

import numpy as np
from PIL import Image


def centre_crop(img: Image.Image, keep: float) -> Image.Image:
    w, h = img.size
    dx, dy = w * (1 - keep) / 2, h * (1 - keep) / 2
    return img.crop(tuple(round(v) for v in (dx, dy, w - dx, h - dy)))


def border_view(img: Image.Image, keep: float = 0.6) -> Image.Image:
    a = np.array(img.convert("RGB"))
    h, w = a.shape[:2]
    y0, y1 = round(h * (1 - keep) / 2), round(h * (1 + keep) / 2)
    x0, x1 = round(w * (1 - keep) / 2), round(w * (1 + keep) / 2)
    mask = np.ones((h, w), bool)
    mask[y0:y1, x0:x1] = False
    a[y0:y1, x0:x1] = np.median(a[mask], axis=0).astype(np.uint8)
    return Image.fromarray(a)


def _normalise(x: np.ndarray) -> np.ndarray:
    return (x / np.maximum(np.linalg.norm(x, axis=1, keepdims=True), 1e-12)).astype(np.float32)


def mean_of(*views: np.ndarray) -> np.ndarray:
    """The L2-normalised mean of several views' (L2-normalised) features."""
    return _normalise(np.sum(views, axis=0))


def backdrop_clusters(backdrop: np.ndarray, k: int, seed: int = 0) -> np.ndarray:
    """A cluster id per photo from its backdrop view's features (spherical k-means, centred)."""
    import faiss

    from core.neighbours import prepare

    x = np.ascontiguousarray(prepare(backdrop))
    k = max(1, min(k, len(x) // 4))
    km = faiss.Kmeans(x.shape[1], k, niter=25, seed=seed, spherical=True, verbose=False,
                      min_points_per_centroid=1)
    km.train(x)
    return km.index.search(x, 1)[1][:, 0]


def border_stats(img: Image.Image, keep: float = 0.6) -> np.ndarray:
    """A cheap backdrop descriptor from pixels alone (no network): mean and spread of each RGB channel
    in the ring outside the central `keep` box, and the ring's mean horizontal and vertical gradient."""
    a = np.asarray(img.convert("RGB"), np.float32)
    h, w = a.shape[:2]
    y0, y1 = round(h * (1 - keep) / 2), round(h * (1 + keep) / 2)
    x0, x1 = round(w * (1 - keep) / 2), round(w * (1 + keep) / 2)
    mask = np.ones((h, w), bool)
    mask[y0:y1, x0:x1] = False
    ring = a[mask]
    g = a.mean(2)
    gx, gy = np.abs(np.diff(g, axis=1)), np.abs(np.diff(g, axis=0))
    return np.r_[ring.mean(0), ring.std(0), gx[mask[:, 1:]].mean(), gy[mask[1:, :]].mean()].astype(np.float32)


def stats_clusters(stats: np.ndarray, k: int, seed: int = 0) -> np.ndarray:
    """A cluster id per photo from border_stats rows (k-means on the standardised figures)."""
    from sklearn.cluster import KMeans

    z = (stats - stats.mean(0)) / np.maximum(stats.std(0), 1e-6)
    k = max(1, min(k, len(z) // 4))
    return KMeans(k, n_init=4, random_state=seed).fit_predict(z)


def remove_backdrop_clusters(features: np.ndarray, backdrop: np.ndarray, k: int = 8, seed: int = 0,
                             assign: np.ndarray | None = None) -> np.ndarray:
    """Each photo's feature minus the mean feature of the photos whose backdrop views cluster with its
    own (the overall mean added back, so only the backdrop's share moves), L2-normalised. `assign`:
    cluster ids already made (e.g. stats_clusters), else from `backdrop` features."""
    if assign is None:
        assign = backdrop_clusters(backdrop, k, seed)
    x = features.astype(np.float64)
    out = x - x.mean(0)
    for c in np.unique(assign):
        sel = assign == c
        out[sel] -= out[sel].mean(0)
    return _normalise(out + x.mean(0))


def project_out(features: np.ndarray, backdrop: np.ndarray, r: int = 8) -> np.ndarray:
    """Features with the `r` main directions of the (centred) backdrop views removed, L2-normalised."""
    b = backdrop.astype(np.float64) - backdrop.mean(0)
    _, _, vt = np.linalg.svd(b, full_matrices=False)
    v = vt[:r]
    x = features.astype(np.float64)
    mu = x.mean(0)
    xc = x - mu
    return _normalise(xc - (xc @ v.T) @ v + mu)
