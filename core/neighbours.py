"""Nearest neighbours and neighbourhood entropy, the trust signal, at any collection size.

Neighbourhood entropy: for photo i, p_ij = softmax_j(s_ij / T) over all OTHER photos j (cosine
similarity s, temperature T). Low entropy means a few photos stand out as very similar, which in
practice means a class-consistent neighbourhood. The self term must be left out: with it, an
isolated photo puts nearly all its mass on itself and looks the most certain of all.

Two regimes (README "The data path at scale" has the measured figures):

- up to `EXACT_LIMIT` photos, exact: each block of rows against every photo, one matrix product
  giving both the k nearest and the entropy;
- above it, approximate (`_approximate`): the photos are cut into `LIST_FACTOR`·sqrt(n) lists by
  k-means on a `PCA_DIM`-d projection (trained on a sample); the photos of one list are the queries
  of one block, scored exactly (full dimensions) against every photo of the `PROBES` lists whose
  means lie nearest to their list's mean. The k nearest come from those candidates (exact scores,
  so only a neighbour outside the probed lists can be missed: recall@10 is measured against exact
  search). The entropy sums the candidates exactly and estimates the rest of the softmax partition
  sum (and its first moment) by importance sampling: `TAIL_SAMPLE` photos drawn from the other lists
  with probability proportional to size · exp(list-mean similarity / T), mixed with a
  `UNIFORM_SHARE` of size-proportional draws so no list has zero probability, each weighted by
  1 / (draws · probability) (an unbiased estimate of each sum).

Features are never copied whole: `Source` holds the features handed to it (an array or a memory
map) with their mean, and prepares (centres, normalises) only the rows a step asks for. A build
reports progress after each block and stops with `Cancelled` when `cancel()` says so.
"""
from __future__ import annotations

import math
import os
import threading
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Callable

import numpy as np
from threadpoolctl import threadpool_limits

# faiss and scipy are imported by the functions that search (not at import time), so reading a
# project's status or opening it never loads them (benchmarks/reopen.py checks).

EXACT_LIMIT = 20_000         # exact kNN and entropy up to here; approximate above
EXACT_KNN_LIMIT = EXACT_LIMIT        # (names kept for callers of the earlier two limits)
EXACT_ENTROPY_LIMIT = EXACT_LIMIT
PCA_DIM = 256                # the projection k-means runs in (lists only; scores are full-dimensional)
LIST_FACTOR = 4              # lists = LIST_FACTOR * sqrt(n)
PROBES = 24                  # lists scored exactly for each list's photos
TAIL_SAMPLE = 4096           # importance-sampled photos per block for the entropy's tail
UNIFORM_SHARE = 0.2          # share of the tail draws spread by list size alone (defensive mixture)
PCA_TRAIN = 20_000           # rows the projection is fitted on
KMEANS_TRAIN_PER_LIST = 24   # rows per list k-means is trained on
KMEANS_ITER = 10
SEED = 0
_BLOCK = 1024
WORKERS = max(1, min(2, os.cpu_count() or 1))   # threads scoring blocks (each one BLAS thread)
BURST_NEIGHBOURS = 8
# Everything above that changes a graph; a cache key must include it (see `settings_key`). Read when
# called, not at import: a caller (a test, a benchmark) that changes one of them changes the key too.
_SETTING_NAMES = dict(exact_limit="EXACT_LIMIT", pca_dim="PCA_DIM", list_factor="LIST_FACTOR", probes="PROBES",
                      tail_sample="TAIL_SAMPLE", uniform_share="UNIFORM_SHARE", pca_train="PCA_TRAIN",
                      kmeans_train_per_list="KMEANS_TRAIN_PER_LIST", kmeans_iter="KMEANS_ITER", seed="SEED",
                      burst_neighbours="BURST_NEIGHBOURS")
FORMAT = 3
APPROXIMATION = {**{k: globals()[v] for k, v in _SETTING_NAMES.items()}, "format": FORMAT}   # at import (kept for readers)

Progress = Callable[[int, int, str], None]
Cancel = Callable[[], bool]


class Cancelled(Exception):
    """A graph build stopped because `cancel()` returned True; nothing is kept."""


def settings_key() -> dict:
    """The module's settings that change a graph, for cache keys: their values now."""
    return {**{k: globals()[v] for k, v in _SETTING_NAMES.items()}, "format": FORMAT}


def prepare(x: np.ndarray) -> np.ndarray:
    """Centre, then L2-normalise (a new array). Centring removes the direction every ImageNet
    feature shares, which otherwise compresses all cosine similarities towards one value."""
    return Source(x).rows(slice(None))


class Source:
    """Features handed over (an array or a memory map, never copied whole) and how to prepare them:
    rows(ids) are centred (when `centre`) and L2-normalised on demand."""

    def __init__(self, features: np.ndarray, centre: bool = True, mean: np.ndarray | None = None):
        self.features = features
        self.n = len(features)
        self.d = features.shape[1] if features.ndim == 2 else 0
        if not centre:
            self.mean = None
        elif mean is not None:
            self.mean = np.asarray(mean, np.float32)
        else:
            total = np.zeros(self.d, np.float64)
            for start in range(0, self.n, 8192):
                total += np.asarray(features[start:start + 8192], np.float64).sum(0)
            self.mean = (total / max(self.n, 1)).astype(np.float32)

    _norms: np.ndarray | None = None

    @property
    def norms(self) -> np.ndarray:
        """|f - mean| of every row (one pass over the features, at the first call)."""
        if self._norms is None:
            out = np.empty(self.n, np.float32)
            for start in range(0, self.n, 16384):
                x = self.raw(slice(start, start + 16384))
                if self.mean is not None:
                    x = x - self.mean            # never in place: raw() may be a view of the caller's array
                out[start:start + 16384] = np.sqrt(np.einsum("ij,ij->i", x, x))
            self._norms = np.maximum(out, 1e-12)
        return self._norms

    def scores(self, q: np.ndarray, ids) -> np.ndarray:
        """Prepared similarities of prepared rows q to the photos ids, from their raw rows (one gather,
        no preparing): q.(f - mean)/|f - mean| = (q.f - q.mean) / |f - mean|."""
        z = q @ self.raw(ids).T
        if self.mean is not None:
            z -= (q @ self.mean)[:, None]
        z /= self.norms[ids][None, :]
        return z

    def raw(self, ids) -> np.ndarray:
        return np.asarray(self.features[ids], np.float32)

    def rows(self, ids) -> np.ndarray:
        x = self.raw(ids)
        if x.ndim == 1:
            x = x[None, :]
        if self.mean is not None:
            x = x - self.mean
        norms = np.sqrt(np.einsum("ij,ij->i", x, x))[:, None]
        x = x / np.maximum(norms, 1e-12)             # a new array: raw() may be a view of the caller's
        return np.ascontiguousarray(x, np.float32)

    def raw_terms(self, ids) -> tuple[np.ndarray, np.ndarray]:
        """(|f - mean|, (f - mean)·mean) per row: with them a raw dot product follows from the
        prepared one, f_i·f_j = n_i n_j s_ij + a_i + a_j + |mean|^2."""
        x = self.raw(ids)
        mean = self.mean if self.mean is not None else np.zeros(self.d, np.float32)
        c = x - mean
        return np.sqrt(np.einsum("ij,ij->i", c, c)), c @ mean


# -- exact ------------------------------------------------------------------------------------
def _top_k(z: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Row-wise k largest of z (most similar first), padded with -inf / -1."""
    b, m = z.shape
    kk = min(k, m)
    if kk < m:
        part = np.argpartition(-z, kk - 1, axis=1)[:, :kk]
    else:
        part = np.broadcast_to(np.arange(m), (b, m)).copy()
    vals = np.take_along_axis(z, part, 1)
    order = np.argsort(-vals, axis=1, kind="stable")
    idx = np.take_along_axis(part, order, 1)
    sims = np.take_along_axis(vals, order, 1)
    idx = np.where(np.isfinite(sims), idx, -1)
    if kk < k:
        idx = np.pad(idx, ((0, 0), (0, k - kk)), constant_values=-1)
        sims = np.pad(sims, ((0, 0), (0, k - kk)), constant_values=-np.inf)
    return sims.astype(np.float32), idx.astype(np.int64)


def _entropy_parts(z: np.ndarray, m: np.ndarray, weight: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(sum w exp(z - m), sum w exp(z - m)(z - m)) per row; -inf entries carry nothing."""
    zz = z.astype(np.float64) - m[:, None]
    e = np.exp(zz)
    if weight is not None:
        e *= weight[None, :]
    with np.errstate(invalid="ignore"):
        ez = np.where(e > 0, e * zz, 0.0)
    return e.sum(1), ez.sum(1)


def _entropy_from_parts(zsum: np.ndarray, ssum: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        h = np.log(zsum) - ssum / zsum
    return np.where(zsum > 0, h, 0.0)


def _exact(src: Source, k: int, temperature: float, progress, cancel, want_entropy: bool = True):
    n = src.n
    x = src.rows(slice(None))
    sims = np.empty((n, k), np.float32)
    idx = np.empty((n, k), np.int64)
    ent = np.zeros(n, np.float64)

    # The neighbours come from faiss's exact inner-product search (as before this module searched
    # at scale, so a collection below the limit keeps exactly the neighbours it had); the entropy
    # from the same block's products.
    import faiss

    index = faiss.IndexFlatIP(x.shape[1])
    index.add(x)
    kk = min(k + 1, n)

    def block(start: int) -> int:
        stop = min(start + _BLOCK, n)
        s, i = index.search(x[start:stop], kk)
        sims[start:stop], idx[start:stop] = _drop_self(s, i, k, start)
        if want_entropy:
            z = x[start:stop] @ x.T
            z[np.arange(stop - start), np.arange(start, stop)] = -np.inf
            zt = z / temperature
            m = zt.max(1)
            ent[start:stop] = _entropy_from_parts(*_entropy_parts(zt, np.where(np.isfinite(m), m, 0.0)))
        return stop - start

    threads = faiss.omp_get_max_threads()
    faiss.omp_set_num_threads(1)                          # see _run_blocks: one thread per worker
    try:
        _run_blocks(block, range(0, n, _BLOCK), n, progress, cancel)
    finally:
        faiss.omp_set_num_threads(threads)
    return sims, idx, ent.astype(np.float32)


def _drop_self(sims: np.ndarray, idx: np.ndarray, k: int, offset: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Leave each row's own photo (row offset + r) out of faiss's k + 1 results."""
    n = len(idx)
    rows = offset + np.arange(n)[:, None]
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


def _run_blocks(block: Callable[[int], int], items, total: int, progress, cancel, message: str = "finding neighbours") -> None:
    """Run block(item) for every item on WORKERS threads, each with one BLAS thread (on shared
    cores, one BLAS team per worker spins far less than a multi-threaded BLAS: 6.5 times faster
    measured with other jobs on the 2 cores); progress after each round, cancel checked before each."""
    items = list(items)
    done = 0
    step = max(1, 4 * WORKERS)
    with threadpool_limits(limits=1, user_api="blas"), ThreadPoolExecutor(WORKERS) as pool:
        for start in range(0, len(items), step):
            if cancel is not None and cancel():
                raise Cancelled()
            done += sum(pool.map(block, items[start:start + step]))
            if progress is not None:
                progress(done, total, message)


def exact_rows(src: Source, queries: np.ndarray, k: int, temperature: float = 0.1,
               chunk: int = 16384) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Exact k nearest (self left out) and exact entropy of the photos `queries`, streaming the
    collection in chunks (no full copy): the reference the approximation is measured against."""
    queries = np.asarray(queries, np.int64)
    q = src.rows(queries)
    b = len(queries)
    best_s = np.full((b, k), -np.inf, np.float32)
    best_i = np.full((b, k), -1, np.int64)
    m = np.full(b, -np.inf)
    zsum = np.zeros(b)
    ssum = np.zeros(b)          # sum exp(z - m) z  (unshifted z)
    for start in range(0, src.n, chunk):
        stop = min(start + chunk, src.n)
        z = q @ src.rows(slice(start, stop)).T
        own = (queries >= start) & (queries < stop)
        z[np.nonzero(own)[0], queries[own] - start] = -np.inf
        s, i = _top_k(z, k)
        i = np.where(i >= 0, i + start, -1)
        cs, ci = np.concatenate([best_s, s], 1), np.concatenate([best_i, i], 1)
        best_s, pos = _top_k(cs, k)
        best_i = np.where(pos >= 0, np.take_along_axis(ci, np.maximum(pos, 0), 1), -1)
        zt = z.astype(np.float64) / temperature
        new_m = np.maximum(m, zt.max(1))
        scale = np.exp(m - new_m)
        e = np.exp(zt - new_m[:, None])
        zsum = zsum * scale + e.sum(1)
        ssum = ssum * scale + (e * np.where(np.isfinite(zt), zt, 0.0)).sum(1)
        m = new_m
    ent = np.log(zsum) + m - ssum / zsum
    return best_s, best_i, ent.astype(np.float32)


# -- approximate ------------------------------------------------------------------------------
@dataclass
class Lists:
    """The collection cut into lists: photo ids grouped by list, and the lists' mean vectors in the
    projected space (their products approximate the mean similarity between two lists)."""
    assign: np.ndarray       # (n,) list of each photo
    order: np.ndarray        # photo ids sorted by list
    starts: np.ndarray       # (L + 1,) offsets into order
    means: np.ndarray        # (L, p) mean projected prepared row of each list

    def members(self, c: int) -> np.ndarray:
        return self.order[self.starts[c]:self.starts[c + 1]]

    @property
    def sizes(self) -> np.ndarray:
        return np.diff(self.starts)


def make_lists(src: Source, n_lists: int | None = None, *, cancel: Cancel | None = None,
               progress: Progress | None = None) -> Lists:
    n = src.n
    rng = np.random.default_rng(SEED)
    L = n_lists or max(1, int(round(LIST_FACTOR * math.sqrt(n))))
    L = min(L, n)
    train = np.sort(rng.choice(n, min(n, PCA_TRAIN), replace=False))
    xt = src.rows(train)
    p = min(PCA_DIM, src.d, len(train))
    # Principal directions of the prepared rows (fitted on a sample).
    cov = (xt - xt.mean(0)).T @ (xt - xt.mean(0))
    w, v = np.linalg.eigh(cov.astype(np.float64))
    proj = np.ascontiguousarray(v[:, ::-1][:, :p], np.float32)
    del xt, cov
    ksample = np.sort(rng.choice(n, min(n, KMEANS_TRAIN_PER_LIST * L), replace=False))
    pk = np.ascontiguousarray(src.rows(ksample) @ proj)
    if cancel is not None and cancel():
        raise Cancelled()
    import faiss
    from scipy import sparse

    threads = faiss.omp_get_max_threads()
    faiss.omp_set_num_threads(1)                          # see _run_blocks: one thread per worker
    try:
        km = faiss.Kmeans(p, L, niter=KMEANS_ITER, seed=SEED, spherical=True, max_points_per_centroid=10 ** 9,
                          min_points_per_centroid=1)
        with threadpool_limits(limits=1, user_api="blas"):
            km.train(pk)
    finally:
        faiss.omp_set_num_threads(threads)
    centroids = np.ascontiguousarray(km.centroids.T)
    assign = np.empty(n, np.int64)
    means = np.zeros((L, p), np.float64)
    lock = threading.Lock()

    def block(start: int) -> int:
        stop = min(start + 4096, n)
        pc = np.ascontiguousarray(src.rows(slice(start, stop)) @ proj)
        a = np.argmax(pc @ centroids, axis=1)
        assign[start:stop] = a
        ind = sparse.csr_matrix((np.ones(stop - start), (a, np.arange(stop - start))), shape=(L, stop - start))
        part = ind @ pc.astype(np.float64)
        with lock:
            means[:] += part
        return stop - start

    _run_blocks(block, range(0, n, 4096), n, progress, cancel, "dividing the collection")
    order = np.argsort(assign, kind="stable")
    starts = np.zeros(L + 1, np.int64)
    np.cumsum(np.bincount(assign, minlength=L), out=starts[1:])
    sizes = np.diff(starts)
    means /= np.maximum(sizes, 1)[:, None]
    return Lists(assign, order, starts, means.astype(np.float32))


def _approximate(src: Source, k: int, temperature: float, progress, cancel, *, probes: int | None = None,
                 tail_sample: int | None = None, want_entropy: bool = True, lists: Lists | None = None):
    n = src.n
    probes = PROBES if probes is None else probes
    tail_sample = TAIL_SAMPLE if tail_sample is None else tail_sample
    lists = lists or make_lists(src, cancel=cancel, progress=progress)
    L = len(lists.starts) - 1
    sizes = lists.sizes
    between = lists.means @ lists.means.T                 # (L, L) approx. mean similarity
    sims = np.empty((n, k), np.float32)
    idx = np.empty((n, k), np.int64)
    ent = np.zeros(n, np.float64)
    probes = min(probes, L)
    src.norms                                             # computed once, before the workers share it

    def block(c: int) -> int:
        q_ids = lists.members(c)
        if len(q_ids) == 0:
            return 0
        rng = np.random.default_rng([SEED + 1, c])         # the same draws whatever the thread order
        row = between[c].copy()
        row[c] = np.inf                                   # the block's own list first
        near = np.argpartition(-row, probes - 1)[:probes] if probes < L else np.arange(L)
        near = near[np.argsort(-row[near])]
        cand = np.concatenate([lists.members(j) for j in near])
        q = src.rows(q_ids)
        z = src.scores(q, cand)                           # own list first: self at (r, r)
        z[np.arange(len(q_ids)), np.arange(len(q_ids))] = -np.inf
        s, pos = _top_k(z, k)
        sims[q_ids] = s
        idx[q_ids] = np.where(pos >= 0, cand[np.maximum(pos, 0)], -1)
        if want_entropy:
            zt = z / temperature
            m = zt.max(1)
            m = np.where(np.isfinite(m), m, 0.0)
            zsum, ssum = _entropy_parts(zt, m)
            rest = np.ones(L, bool)
            rest[near] = False
            rest &= sizes > 0
            if rest.any() and tail_sample > 0:
                rl = np.nonzero(rest)[0]
                logit = between[c, rl].astype(np.float64) / temperature
                imp = sizes[rl] * np.exp(logit - logit.max())
                prob = (1 - UNIFORM_SHARE) * imp / imp.sum() + UNIFORM_SHARE * sizes[rl] / sizes[rl].sum()
                draws = rng.choice(len(rl), size=tail_sample, p=prob)
                lists_drawn = rl[draws]
                members = lists.order[lists.starts[lists_drawn]
                                      + (rng.random(tail_sample) * sizes[lists_drawn]).astype(np.int64)]
                # Each draw stands for sizes / (draws * prob) photos (unbiased for the tail's sums).
                wdraw = sizes[lists_drawn] / (tail_sample * prob[draws])
                uniq, inv = np.unique(members, return_inverse=True)
                wt = np.bincount(inv, weights=wdraw, minlength=len(uniq))
                zs = src.scores(q, uniq) / temperature
                ts, tss = _entropy_parts(zs, m, wt)
                zsum, ssum = zsum + ts, ssum + tss
            ent[q_ids] = _entropy_from_parts(zsum, ssum)
        return len(q_ids)

    _run_blocks(block, range(L), n, progress, cancel)
    return sims, idx, ent.astype(np.float32)


def search(src: Source, k: int, temperature: float = 0.1, *, exact_limit: int | None = None,
           want_entropy: bool = True, progress: Progress | None = None, cancel: Cancel | None = None,
           **approx) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(sims, idx, entropy) for every photo of `src`: the k nearest other photos (most similar first,
    padded with -inf / -1) and the neighbourhood entropy; exact up to `exact_limit` photos."""
    n = src.n
    exact_limit = EXACT_LIMIT if exact_limit is None else exact_limit   # (module settings read when called)
    if n < 2:
        return (np.full((n, k), -np.inf, np.float32), np.full((n, k), -1, np.int64), np.zeros(n, np.float32))
    if n <= exact_limit:
        return _exact(src, k, temperature, progress, cancel, want_entropy)
    return _approximate(src, k, temperature, progress, cancel, want_entropy=want_entropy, **approx)


def knn(x: np.ndarray, k: int, *, exact_limit: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """The k nearest other photos of every photo by cosine similarity (rows of x L2-normalised).

    Returns (similarities, indices), each (n, k), most similar first, self excluded. Rows with fewer
    than k others are padded with index -1 and similarity -inf.
    """
    sims, idx, _ = search(Source(np.asarray(x, np.float32), centre=False), k, exact_limit=exact_limit,
                          want_entropy=False)
    return sims, idx


def neighbourhood_entropy(x: np.ndarray, temperature: float = 0.1, *, exact_limit: int | None = None,
                          knn_result=None, tail_sample: int | None = None, seed: int = 0) -> np.ndarray:
    """Entropy of each photo's softmax similarity distribution over all other photos (self left out),
    rows of x L2-normalised. Exact up to `exact_limit` photos, approximated above (module docstring).
    `knn_result` and `seed` are accepted for older callers and not needed."""
    src = Source(np.asarray(x, np.float32), centre=False)
    k = 64 if knn_result is None else knn_result[0].shape[1]
    k = max(1, min(k, src.n - 1))
    exact_limit = EXACT_LIMIT if exact_limit is None else exact_limit
    approx = dict(tail_sample=tail_sample) if src.n > exact_limit else {}
    return search(src, k, temperature, exact_limit=exact_limit, **approx)[2]


def mutual_mask(idx: np.ndarray, k: int) -> np.ndarray:
    """mask[i, r] is True when i is also among the k nearest of its r-th neighbour idx[i, r]."""
    n = len(idx)
    top = idx[:, :k].astype(np.int64)
    src = np.repeat(np.arange(n, dtype=np.int64), top.shape[1])
    valid = top.ravel() >= 0
    # Pairs are encoded as src * n + neighbour; a padded -1 would encode (src - 1, n - 1), a real
    # pair, so padding is left out of the forward pairs as well as the answer.
    forward = np.sort((src * n + top.ravel())[valid])
    del src
    out = np.zeros(top.size, bool)
    flat = top.ravel()
    step = 1 << 22
    for start in range(0, top.size, step):
        stop = min(start + step, top.size)
        rows = np.arange(start, stop, dtype=np.int64) // top.shape[1]
        backward = flat[start:stop] * n + rows
        pos = np.minimum(np.searchsorted(forward, backward), max(len(forward) - 1, 0))
        out[start:stop] = (forward[pos] == backward) & (flat[start:stop] >= 0) if len(forward) else False
    return out.reshape(n, -1)


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
    """Everything proposals need about the collection's geometry. The features are not part of it:
    `source` refers to the array (or memory map) handed to `build_graph`, and `rows(ids)` prepares
    just the rows asked for. A graph loaded from a cache gets its source with `attach`."""
    sims: np.ndarray       # (n, k) neighbour similarities, most similar first
    idx: np.ndarray        # (n, k) neighbour indices
    entropy: np.ndarray    # (n,) neighbourhood entropy
    mutual: np.ndarray     # (n, k) mutual-neighbour mask
    burst: np.ndarray      # (n,) near-duplicate burst id or -1
    source: Source | None = field(default=None, repr=False, compare=False)

    @property
    def n(self) -> int:
        return len(self.idx)

    def attach(self, source: Source) -> "Graph":
        self.source = source
        return self

    def rows(self, ids) -> np.ndarray:
        """Prepared (centred, normalised) features of the photos `ids`."""
        if self.source is None:
            raise ValueError("this graph has no features attached")
        return self.source.rows(ids)

    @property
    def x(self) -> np.ndarray:
        """All prepared features: a new full copy each time (prefer `rows`)."""
        return self.rows(slice(None))


def build_graph(features: np.ndarray, *, k: int = 64, temperature: float = 0.1,
                burst_threshold: float = 0.97, centre: bool = True, progress: Progress | None = None,
                cancel: Cancel | None = None, exact_limit: int | None = None) -> Graph:
    """The neighbour graph of `features` (an array or a memory map; not copied whole). Progress is
    reported after each block; `cancel()` returning True stops it with `Cancelled`."""
    src = Source(features, centre=centre)
    n = src.n
    k = max(1, min(k, n - 1)) if n > 1 else 1
    sims, idx, ent = search(src, k, temperature, exact_limit=exact_limit, progress=progress, cancel=cancel)
    # Bursts are judged on the raw features (centring stretches small differences), recovered from
    # the prepared similarities: f_i.f_j = n_i n_j s_ij + a_i + a_j + |mean|^2.
    near = idx[:, :BURST_NEIGHBOURS]
    raw_sims = np.full(near.shape, -np.inf, np.float32)
    if n:
        norm = np.empty(n, np.float32)
        dot = np.empty(n, np.float32)
        for start in range(0, n, 65536):
            norm[start:start + 65536], dot[start:start + 65536] = src.raw_terms(slice(start, start + 65536))
        mm = float(src.mean @ src.mean) if src.mean is not None else 0.0
        j = np.maximum(near, 0)
        raw = norm[:, None] * norm[j] * sims[:, :near.shape[1]] + dot[:, None] + dot[j] + mm
        raw_sims = np.where(near >= 0, raw, -np.inf).astype(np.float32)
    if cancel is not None and cancel():
        raise Cancelled()
    return Graph(sims, idx, ent, mutual_mask(idx, k), bursts(raw_sims, near, burst_threshold), src)
