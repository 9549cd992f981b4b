"""Label propagation kept with the graph: computed once per change of the seeds, in a memory order
that keeps each step's reads close together.

The diffusion of core/proposals.py (`F <- a W F + (1 - a) Y`, `iterations` times from `F = Y`) is a
sparse product per step whose cost is the random reads of neighbour rows of F (each photo's k
neighbours lie anywhere in the collection). Here the photos are renumbered once per graph by
reverse Cuthill-McKee (scipy.sparse.csgraph) so that neighbours get nearby numbers and the reads
mostly hit the cache: 20 steps in 64-68 ms against 86-163 ms (two runs under load) on a
synthetic 100,000-photo 5-NN graph of 10 clusters, 11 columns. Each row keeps its entries in their original
order, so every sum is the same sequence of float32 operations as the plain product: the result is
bit for bit the same.

The result is cached with the seeds it was computed from (state, label_of, labels), so asking again
without a decision in between (the proposal queue forms several batches per call) costs nothing.

A decision's seed difference is diffused alone (linearity: F changes by M_T dY), in only the 2-3
label columns it touched (`_update`), one vector at a time, and added to the kept F; rows it does not
reach keep their values. 20 steps on the renumbered 100,000-photo graph: 16 ms for 2 columns against
41 ms for the full product of 5 columns and 70 ms of 11 (CPU time, SINGLE_STEP / MULTI_STEP below).
That is not bit for bit a fresh computation (float32 rounding, checked against the plain diffusion in
tests/test_incremental_propagation.py). A new label widens the kept result by a zero column at its
place (`_add_labels`) and is then updated the same way. A change of many photos, and every REFRESH
updates, computes afresh.

Following the difference photo by photo (its support is within
T reverse-neighbour hops of the changed photos) was tried and measured: on kNN graphs it reaches
most of the collection within the 20 steps (the graph mixes fast), so it did as much work as the
full product and was slower in numpy. It is not used.
"""
from __future__ import annotations

import numpy as np


FULL_SHARE = 0.05       # a change of more photos' seeds than this share: computed afresh
REFRESH = 64            # computed afresh after this many updates, so rounding cannot drift
# CPU ms of the 20 steps on a 100,000-photo 5-NN graph (measured once with a throwaway script): scipy's
# product of one vector is about 4 times cheaper per column than of several at once (csr_matvec against
# csr_matvecs): 1 column 7.9, and for 2 / 3 / 5 / 11 columns at once 30 / 38 / 41 / 70. An update
# diffuses its columns one at a time while that costs less than the full product.
SINGLE_STEP = 8
MULTI_STEP = {2: 30, 3: 38, 4: 40, 5: 41, 6: 47, 7: 52, 8: 57, 9: 62, 10: 66, 11: 70}


class PropagationCache:
    """The renumbered step matrix of one graph and the last result with its seeds."""

    def __init__(self, step):
        from scipy.sparse import csr_matrix
        from scipy.sparse.csgraph import reverse_cuthill_mckee

        n = step.shape[0]
        sym = (step + step.T).tocsr()
        self.order = reverse_cuthill_mckee(sym, symmetric_mode=True).astype(np.int64)   # new -> old
        self.place = np.empty(n, np.int64)                                             # old -> new
        self.place[self.order] = np.arange(n)
        # Row r of the renumbered matrix is row order[r], entries in their original order, columns renamed.
        starts, ends = step.indptr[self.order], step.indptr[self.order + 1]
        counts = ends - starts
        pos = np.repeat(starts - (np.cumsum(counts) - counts), counts) + np.arange(int(counts.sum()))
        indptr = np.concatenate([[0], np.cumsum(counts)])
        self.step = csr_matrix((step.data[pos], self.place[step.indices[pos]], indptr), shape=(n, n))
        self.step.has_sorted_indices = False
        self.key = self.names = None
        self.prob = self.f = self.y = None
        self.updates = 0

    def get(self, state: np.ndarray, label_of: np.ndarray, n_labels: int, settings,
            names: list[str] | None = None) -> np.ndarray:
        """The label distribution (n, n_labels + 1) for these seeds; shared, read-only. `names`: the
        label names behind the columns, so that a new label widens the kept result (`_add_labels`)."""
        figures = (n_labels, settings.alpha, settings.iterations, settings.unknown_prior)
        if (self.key is not None and names is not None and self.names is not None and len(names) == n_labels
                and self.key[0][1:] == figures[1:] and self.key[0][0] < n_labels):
            self._add_labels(list(names))
        self.names = None if names is None else list(names)
        if self.key is not None and self.key[0] == figures:
            changed = np.flatnonzero((state != self.key[1]) | (label_of != self.key[2]))
            if len(changed) == 0:
                return self.prob
            if len(changed) <= FULL_SHARE * len(state) and self.updates < REFRESH and self._update(
                    changed, state, label_of, n_labels, settings):
                return self.prob
        y = seeds(state[self.order], label_of[self.order], n_labels, settings.unknown_prior)
        f = y.copy()
        a = settings.alpha
        for _ in range(settings.iterations):
            f = a * (self.step @ f) + (1 - a) * y
        self.f, self.y = f, y
        prob = f / np.maximum(f.sum(1, keepdims=True), 1e-12)
        self.prob = prob[self.place]
        self.key = (figures, state.copy(), label_of.copy())
        self.updates = 0
        return self.prob

    def _add_labels(self, names: list[str]) -> None:
        """New labels: their columns of Y, so of F, are zero until a photo carries them. Zero columns go
        in at their places ("unknown" stays last) and the kept label indices are renumbered, so the
        decision that gave the label is then an update like any other, not a fresh product over every
        column. Nothing is done (a fresh product follows) unless every old name is still there."""
        pos = {name: i for i, name in enumerate(names)}
        if any(name not in pos for name in self.names):
            return
        new_of = np.array([pos[name] for name in self.names] + [len(names)], np.int64)   # old column -> new
        n = len(self.f)

        def widen(a):
            out = np.zeros((n, len(names) + 1), a.dtype)
            out[:, new_of] = a
            return out

        self.f, self.y, self.prob = widen(self.f), widen(self.y), widen(self.prob)
        old_of = self.key[2]
        self.key = ((len(names),) + self.key[0][1:], self.key[1],
                    np.where(old_of >= 0, new_of[np.maximum(old_of, 0)], old_of))

    def _update(self, changed, state, label_of, n_labels, settings) -> bool:
        """By linearity, F changes by the diffusion of the seed difference, which lies in the few label
        columns the decision touched (the label given, "unknown"): only those columns are diffused, one
        vector at a time. Used while that costs less than the full product (SINGLE_STEP, MULTI_STEP);
        otherwise returns False."""
        new_place = self.place[changed]
        new_y = seeds(state[changed], label_of[changed], n_labels, settings.unknown_prior)
        dy = new_y - self.y[new_place]
        cols = np.flatnonzero(np.abs(dy).max(0) > 0)
        if len(cols) >= n_labels + 1 or len(cols) * SINGLE_STEP > MULTI_STEP[min(n_labels + 1, 11)]:
            return False
        n, a = len(state), settings.alpha
        d = np.zeros((n, len(cols)), np.float32)

        def diffuse(j: int) -> None:                   # one vector at a time: scipy's single-vector product
            v = np.zeros(n, np.float32)
            v[new_place] = dy[:, cols[j]]
            seed = (1 - a) * v
            for _ in range(settings.iterations):
                v = a * (self.step @ v)
                v += seed
            d[:, j] = v

        if len(cols) > 1 and n >= THREADED_FROM:
            list(_pool().map(diffuse, range(len(cols))))
        else:
            for j in range(len(cols)):
                diffuse(j)
        rows = np.flatnonzero((d != 0).any(1))         # renumbered rows the difference reached
        self.f[np.ix_(rows, cols)] += d[rows]
        f = self.f[rows]
        self.prob[self.order[rows]] = f / np.maximum(f.sum(1, keepdims=True), 1e-12)
        self.y[new_place] = new_y
        self.key[1][changed] = state[changed]
        self.key[2][changed] = label_of[changed]
        self.updates += 1
        return True


THREADED_FROM = 50_000   # photos from which an update's columns are diffused on parallel threads


def _pool():
    """Threads for an update's columns: scipy's sparse product releases the GIL, so two columns on two
    threads took 513 ms against 829 ms one after the other (1,000,000 rows, 20 steps, 2 cores, one run
    of a throwaway script). Each column is the same sequence of operations either way."""
    global _POOL
    if _POOL is None:
        import os
        from concurrent.futures import ThreadPoolExecutor

        _POOL = ThreadPoolExecutor(max(1, min(4, os.cpu_count() or 1)), thread_name_prefix="propagation")
    return _POOL


_POOL = None


def seeds(state: np.ndarray, label_of: np.ndarray, n_labels: int, unknown_prior: float) -> np.ndarray:
    """Y: a labelled photo one-hot on its label, a set-aside photo one-hot on unknown, an unlabelled
    photo `unknown_prior` on unknown (float32, (len(state), n_labels + 1))."""
    from core.proposals import FREE, LABELLED, SET_ASIDE

    y = np.zeros((len(state), n_labels + 1), np.float32)
    lab = state == LABELLED
    y[np.nonzero(lab)[0], label_of[lab]] = 1.0
    y[state == SET_ASIDE, n_labels] = 1.0
    y[state == FREE, n_labels] = unknown_prior
    return y
