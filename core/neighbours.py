"""Nearest neighbours (faiss) and neighbourhood entropy, the trust signal.

Neighbourhood entropy: for photo i, p_ij = softmax_j(s_ij / T) over all OTHER photos j (cosine
similarity s, temperature T). Low entropy means a few photos stand out as very similar, which in
practice means a class-consistent neighbourhood. The self term must be left out: with it, an
isolated photo puts nearly all its mass on itself and looks the most certain of all.
"""
from __future__ import annotations

from dataclasses import dataclass

import faiss
import numpy as np

EXACT_KNN_LIMIT = 100_000      # exact inner-product search up to here (10^5 x 10^5 stays minutes on 2 cores)
EXACT_ENTROPY_LIMIT = 50_000   # exact blocked entropy up to here; sampled tail estimate above
_BLOCK = 1024
BURST_NEIGHBOURS = 8


def prepare(x: np.ndarray) -> np.ndarray:
    """Centre, then L2-normalise. Centring removes the direction every ImageNet feature shares,
    which otherwise compresses all cosine similarities towards one value."""
    x = np.asarray(x, dtype=np.float32)
    if len(x) == 0:
        return x.copy()
    x = x - x.mean(axis=0, keepdims=True)
    norms = np.linalg.norm(x, axis=1, keepdims=True)
    return np.ascontiguousarray(x / np.maximum(norms, 1e-12), dtype=np.float32)


def knn(x: np.ndarray, k: int, *, exact_limit: int = EXACT_KNN_LIMIT) -> tuple[np.ndarray, np.ndarray]:
    """The k nearest other photos of every photo by cosine similarity (rows of x L2-normalised).

    Returns (similarities, indices), each (n, k), most similar first, self excluded. Rows with fewer
    than k others are padded with index -1 and similarity -inf.
    """
    x = np.ascontiguousarray(x, dtype=np.float32)
    n, d = x.shape
    kk = min(k + 1, n)
    if n <= exact_limit:
        index = faiss.IndexFlatIP(d)
    else:
        # Graph-based approximate search; recall is measured in benchmarks/neighbours_bench.py.
        index = faiss.IndexHNSWFlat(d, 32, faiss.METRIC_INNER_PRODUCT)
        index.hnsw.efConstruction = 80
        index.hnsw.efSearch = max(128, 2 * kk)
    index.add(x)
    sims, idx = index.search(x, kk)
    return _drop_self(sims, idx, k)


def _drop_self(sims: np.ndarray, idx: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    n = len(idx)
    rows = np.arange(n)[:, None]
    is_self = idx == rows
    # Where self is missing from the list (exact duplicates can push it out), drop the last entry.
    no_self = ~is_self.any(axis=1)
    is_self[no_self, -1] = True
    keep = ~is_self
    out_i = idx[keep].reshape(n, -1)[:, :k]
    out_s = sims[keep].reshape(n, -1)[:, :k]
    if out_i.shape[1] < k:
        pad = k - out_i.shape[1]
        out_i = np.pad(out_i, ((0, 0), (0, pad)), constant_values=-1)
        out_s = np.pad(out_s, ((0, 0), (0, pad)), constant_values=-np.inf)
    return np.ascontiguousarray(out_s, np.float32), np.ascontiguousarray(out_i, np.int64)


def _entropy_from_logits(z: np.ndarray) -> np.ndarray:
    """Entropy (nats) of softmax over each row of z; -inf entries carry no mass."""
    m = z.max(axis=1, keepdims=True)
    e = np.exp(z - m)
    zsum = e.sum(axis=1, keepdims=True)
    p = e / zsum
    with np.errstate(invalid="ignore"):
        plogp = np.where(p > 0, p * (z - m - np.log(zsum)), 0.0)
    return -plogp.sum(axis=1)


def neighbourhood_entropy(x: np.ndarray, temperature: float = 0.1, *, exact_limit: int = EXACT_ENTROPY_LIMIT,
                          knn_result: tuple[np.ndarray, np.ndarray] | None = None, tail_sample: int = 4096,
                          seed: int = 0) -> np.ndarray:
    """Entropy of each photo's softmax similarity distribution over all other photos (self left out).

    Exact, in blocks of rows, up to `exact_limit` photos. Above it: the nearest neighbours
    (`knn_result`) are summed exactly and the remaining n - 1 - k terms are estimated from a uniform
    sample of `tail_sample` photos, scaled up; the error is measured in benchmarks/neighbours_bench.py.
    """
    x = np.ascontiguousarray(x, dtype=np.float32)
    n = len(x)
    if n < 2:
        return np.zeros(n, np.float32)
    out = np.empty(n, np.float64)
    if n <= exact_limit:
        for start in range(0, n, _BLOCK):
            stop = min(start + _BLOCK, n)
            z = (x[start:stop] @ x.T) / temperature
            z[np.arange(stop - start), np.arange(start, stop)] = -np.inf
            out[start:stop] = _entropy_from_logits(z.astype(np.float64))
        return out.astype(np.float32)
    if knn_result is None:
        knn_result = knn(x, 64)
    sims, idx = knn_result
    k = sims.shape[1]
    rng = np.random.default_rng(seed)
    tail_scale = max(n - 1 - k, 0) / tail_sample
    for start in range(0, n, _BLOCK):
        stop = min(start + _BLOCK, n)
        rows = np.arange(start, stop)
        sample = rng.integers(0, n, size=tail_sample)
        zt = (x[start:stop] @ x[sample].T).astype(np.float64) / temperature
        # Sampled photos that are self or already among the exact neighbours carry no tail mass.
        excluded = (sample[None, :] == rows[:, None]) | (idx[start:stop, :, None] == sample[None, None, :]).any(1)
        zt[excluded] = -np.inf
        zh = sims[start:stop].astype(np.float64) / temperature
        m = np.maximum(zh.max(axis=1), np.where(np.isfinite(zt), zt, -np.inf).max(axis=1))[:, None]
        eh, et = np.exp(zh - m), np.exp(zt - m) * tail_scale
        zsum = eh.sum(1) + et.sum(1)
        zt_f = np.where(np.isfinite(zt), zt, 0.0)
        weighted = (eh * zh).sum(1) + (et * zt_f).sum(1)
        # H = log Z - E[z]  with Z and E[z] taken over the (estimated) full distribution.
        out[start:stop] = np.log(zsum) + m[:, 0] - weighted / zsum
    return out.astype(np.float32)


def mutual_mask(idx: np.ndarray, k: int) -> np.ndarray:
    """mask[i, r] is True when i is also among the k nearest of its r-th neighbour idx[i, r]."""
    n = len(idx)
    top = idx[:, :k].astype(np.int64)
    src = np.repeat(np.arange(n, dtype=np.int64), top.shape[1])
    valid = top.ravel() >= 0
    # Pairs are encoded as src * n + neighbour; a padded -1 would encode (src - 1, n - 1), a real
    # pair, so padding is left out of the forward pairs as well as the answer.
    forward = (src * n + top.ravel())[valid]
    backward = top.ravel() * n + src
    return (np.isin(backward, forward) & valid).reshape(n, -1)


def bursts(sims: np.ndarray, idx: np.ndarray, threshold: float) -> np.ndarray:
    """Near-duplicate bursts: connected components (scipy.sparse.csgraph) of neighbour pairs with
    similarity >= threshold. Returns a burst id per photo (-1 for photos without a near-duplicate);
    bursts are numbered in the order of their lowest photo index."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    n = len(idx)
    out = np.full(n, -1, np.int64)
    rows, cols = np.nonzero((sims >= threshold) & (idx >= 0))
    if n == 0 or len(rows) == 0:
        return out
    pairs = coo_matrix((np.ones(len(rows), np.int8), (rows, idx[rows, cols].astype(np.int64))), shape=(n, n))
    _, comp = connected_components(pairs, directed=False)
    sizes = np.bincount(comp)
    lowest = np.full(len(sizes), n, np.int64)
    np.minimum.at(lowest, comp, np.arange(n))
    multi = np.nonzero(sizes > 1)[0]
    burst_of = np.full(len(sizes), -1, np.int64)
    burst_of[multi[np.argsort(lowest[multi], kind="stable")]] = np.arange(len(multi))
    return burst_of[comp]


@dataclass
class Graph:
    """Everything proposals need about the collection's geometry, computed once per embedding."""
    x: np.ndarray          # (n, d) prepared (centred, normalised) features
    sims: np.ndarray       # (n, k) neighbour similarities, most similar first
    idx: np.ndarray        # (n, k) neighbour indices
    entropy: np.ndarray    # (n,) neighbourhood entropy
    mutual: np.ndarray     # (n, k) mutual-neighbour mask
    burst: np.ndarray      # (n,) near-duplicate burst id or -1

    @property
    def n(self) -> int:
        return len(self.x)


def build_graph(features: np.ndarray, *, k: int = 64, temperature: float = 0.1,
                burst_threshold: float = 0.97, centre: bool = True) -> Graph:
    x = prepare(features) if centre else np.ascontiguousarray(features, np.float32)
    k = max(1, min(k, len(x) - 1)) if len(x) > 1 else 1
    sims, idx = knn(x, k)
    ent = neighbourhood_entropy(x, temperature, knn_result=(sims, idx))
    # Bursts are judged on the raw features: centring stretches small differences.
    # A burst is a handful of shots, so the first few neighbours suffice.
    raw = np.asarray(features, np.float32)
    near = idx[:, :BURST_NEIGHBOURS]
    raw_sims = np.stack([(raw * raw[np.maximum(near[:, r], 0)]).sum(1) for r in range(near.shape[1])], 1)
    raw_sims = np.where(near >= 0, raw_sims, -np.inf)
    return Graph(x, sims, idx, ent, mutual_mask(idx, k), bursts(raw_sims, near, burst_threshold))
