"""Label propagation kept up to date by each decision instead of recomputed over every photo.

The diffusion of core/proposals.py (`F <- a W F + (1 - a) Y`, `iterations` times from `F = Y`) is
linear in the seed matrix Y. After T steps F = M_T Y, so when a decision changes the seed rows of a
few photos (dY), the result changes by M_T dY, and that difference is computed by running the same
recurrence on dY alone: `d <- a W d + (1 - a) dY`, starting from d = dY. Its support is the photos
within T reverse-neighbour hops of the changed ones, and only the label columns the decision touched
(the new label, "unknown"): per decision the work follows what the decision touched, not the
collection. Values below `TOLERANCE` are dropped as they spread, so far photos are not visited for
contributions far below float32 resolution of the result.

The cache lives with the graph (a graph never changes once built) and is keyed by the settings the
diffusion uses. It is recomputed from scratch (the exact full product) when the label list changes
length, when a change touches more than `FULL_SHARE` of the photos, and every `REFRESH` updates, so
rounding cannot drift. The rows a recompute leaves untouched are bit for bit those of the last full
computation.
"""
from __future__ import annotations

import numpy as np

TOLERANCE = 1e-9        # a difference smaller than this (absolute) is not spread further
FULL_SHARE = 0.05       # a change touching more photos than this share: recompute everything
REFRESH = 256           # recompute everything after this many local updates


class PropagationCache:
    """The last seeds (state, label_of), the unnormalised diffusion F (float64) and the normalised
    label distribution handed out (float32, shape (n, labels + 1))."""

    def __init__(self):
        self.state = self.label_of = self.y = self.f = self.prob = None
        self.n_labels = -1
        self.updates = 0
        self.last_touched = -1       # photos whose rows the last update changed (-1: full computation)

    def get(self, step, step_csc, state: np.ndarray, label_of: np.ndarray, n_labels: int, settings) -> np.ndarray:
        """The label distribution for these seeds (read-only: callers copy before changing it)."""
        n = len(state)
        if self.prob is not None and n_labels == self.n_labels and len(self.state) == n:
            changed = np.flatnonzero((state != self.state) | (label_of != self.label_of))
            if len(changed) == 0:
                return self.prob
            if len(changed) <= FULL_SHARE * n and self.updates < REFRESH:
                self._update(step_csc, changed, state, label_of, settings)
                return self.prob
        self._full(step, state, label_of, n_labels, settings)
        return self.prob

    # -- the two ways ----------------------------------------------------------------------------
    def _full(self, step, state, label_of, n_labels, settings) -> None:
        y = seeds(state, label_of, n_labels, settings.unknown_prior)
        f = y.copy()
        a = settings.alpha
        for _ in range(settings.iterations):
            f = a * (step @ f) + (1 - a) * y
        self.prob = f / np.maximum(f.sum(1, keepdims=True), 1e-12)
        self.f = f.astype(np.float64)
        self.y = y
        self.state, self.label_of, self.n_labels = state.copy(), label_of.copy(), n_labels
        self.updates = 0
        self.last_touched = -1

    def _update(self, step_csc, changed, state, label_of, settings) -> None:
        new_y = seeds(state[changed], label_of[changed], self.n_labels, settings.unknown_prior)
        dy = new_y.astype(np.float64) - self.y[changed]
        cols = np.flatnonzero(np.abs(dy).max(0) > 0)
        a = settings.alpha
        n = len(state)
        touched = changed
        if len(cols):
            dy = dy[:, cols]
            rows, d = changed, dy.copy()
            for _ in range(settings.iterations):
                spread = np.asarray(step_csc[:, rows] @ d)          # (n, len(cols)) dense
                spread *= a
                spread[changed] += (1 - a) * dy
                rows = np.flatnonzero(np.abs(spread).max(1) > TOLERANCE)
                d = spread[rows]
            touched = rows
            self.f[np.ix_(rows, cols)] += d
            f = self.f[rows]
            self.prob[rows] = (f / np.maximum(f.sum(1, keepdims=True), 1e-12)).astype(self.prob.dtype)
        self.y[changed] = new_y
        self.state[changed] = state[changed]
        self.label_of[changed] = label_of[changed]
        self.updates += 1
        self.last_touched = len(touched)
        del n


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
