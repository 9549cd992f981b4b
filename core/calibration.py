"""Trust that tells the truth: a group's shown trust is its expected purity.

A group's **purity** is the share of its members that belong to its majority class; the annotator
observes it on every accepted group (1 - the share taken out). Two figures are calibrated:

* **trust** — the expected purity of the group;
* **confidence** of a suggested label — the expected share of the members that carry that label.

Which features: on 191 groups of Fashion-MNIST test 2,000 (cold and after 15, 30, 60 accepted groups)
and 90 of the demo, the mutual-neighbour share and the share of members' nearest inside the group
predicted purity no better than chance (correlation -0.07 to 0.12; on the demo the mutual share is 1.0
for every group); entropy rank (-0.49 / -0.13) and pair similarity (0.35 / 0.33) did, and a linear fit
of those two on Fashion-MNIST scored the lowest error on the demo (0.159 against 0.175 with all six).

How (two published methods, combined):

1. A **prior** that holds before the first decision: logistic regression with fractional targets
   (each group counted once as "pure" with weight size x purity and once as "not pure" with weight
   size x (1 - purity)) from a few features of the group to its purity. Its coefficients are
   fitted offline on two collections, Fashion-MNIST train 2,000 and scikit-learn digits
   (``python -m benchmarks.calibration --fit-prior``), and written below; Fashion-MNIST test 2,000 and
   the demo are held out to measure how it carries over (fitted on test 2,000 alone it scored worse on
   the other sets: README, trust section).
2. **Isotonic regression** (monotone, scikit-learn) from the prior's figure to the purity the
   annotator observed, fitted on the accepted groups as the sitting goes on, blended with
   ``PSEUDO_PHOTOS`` pseudo-observations that agree with the prior (so a handful of decisions moves
   the figure a little, a sitting moves it a lot). Each later decision multiplies an earlier one's
   weight by ``RECENT_DECAY``: the groups still to come are harder than the easy ones used up first,
   so the latest decisions say most about them (equal weights made the figure worse after labels than
   before on Fashion-MNIST; measured in README).

Group features (``FEATURES``):
entropy_rank   mean neighbourhood-entropy rank of the members (0 = the most certain photo)
pair_similarity  mean cosine similarity of two members (in the graph's centred feature space)
log_size       log of the number of members
margin         the engine's raw mean confidence in its suggested label (0 without one)
suggested      1 when the engine suggests a label (a probable-label group or a split part of one)
The group order is not changed by any of this: it stays the engine's expected photos per action.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np

from core.neighbours import Graph

FEATURES = ("entropy_rank", "pair_similarity", "log_size", "margin", "suggested")
PSEUDO_PHOTOS = 40.0        # weight of the prior against the annotator's observed groups, in photos
RECENT_DECAY = 0.6          # each later accepted group multiplies an observation's weight by this (the shift)
EPS = 1e-3

# Fitted by `python -m benchmarks.calibration --fit-prior` on Fashion-MNIST train 2,000 and scikit-learn digits,
# embedded with the generalised-mean pooling new projects use (refitted 2026-12-05 when it became the default)
# (the first 50 groups cold and after 15 accepted groups and a relearn, as the calibration benchmark
# measures; Fashion-MNIST test 2,000 and the demo held out); intercept first, then one weight per
# FEATURES entry (standardised by MEAN / SCALE).
PRIOR_TRUST = {'intercept': 3.1007, 'coef': [-1.2928, -0.6707, -0.7069, 1.2883, -1.1738]}
PRIOR_LABEL = {'intercept': -5.8106, 'coef': [-0.8664, -0.6679, -1.332, 3.0894, 0.0079]}
MEAN = [0.3411, 0.5924, 2.3716, 0.059, 0.0872]
SCALE = [0.1758, 0.1074, 0.7051, 0.1931, 0.2821]


def group_features(graph: Graph, members: Sequence[int], suggested: bool, margin: float | None,
                   ent_rank: np.ndarray | None = None) -> np.ndarray:
    """The FEATURES of one group of photo indices (anchor first)."""
    m = np.asarray(members, np.int64)
    if ent_rank is None:
        ent_rank = entropy_ranks(graph)
    size = len(m)
    pair = pair_similarity(graph, m) if size > 1 else 1.0
    return np.array([float(ent_rank[m].mean()), pair, float(np.log(size)),
                     float(margin or 0.0) if suggested else 0.0, float(bool(suggested))])


PAIR_CACHE = 4096          # groups whose pair similarity is kept per graph (a held group comes back each call)


def pair_similarity(graph: Graph, members: np.ndarray) -> float:
    """Mean over the pairs i != j of the members' prepared x_i . x_j, without the size x size matrix.
    It reads the members' vectors (the graph holds no copy), so it is kept per graph and member list:
    a group is measured again on every proposal call that returns it and when it is accepted."""
    from core import proposals

    cache = proposals.derived(graph).setdefault("pair_similarity", {})
    key = members.tobytes()
    if key not in cache:
        if len(cache) >= PAIR_CACHE:
            cache.clear()
        x = graph.rows(members).astype(np.float64)
        tot = x.sum(0)
        size = len(members)
        cache[key] = float((tot @ tot - np.einsum("ij,ij->", x, x)) / (size * (size - 1)))
    return cache[key]


def entropy_ranks(graph: Graph) -> np.ndarray:
    """Each photo's entropy rank in [0, 1], made once per graph (shared, read-only)."""
    from core import proposals

    return proposals.entropy_ranks(graph)


def _logit(p):
    p = np.clip(p, EPS, 1 - EPS)
    return np.log(p / (1 - p))


def prior(features: np.ndarray, model: dict) -> np.ndarray:
    """The prior's figure for each row of `features` (n, len(FEATURES))."""
    z = (np.atleast_2d(features) - np.asarray(MEAN)) / np.asarray(SCALE)
    return 1.0 / (1.0 + np.exp(-(model["intercept"] + z @ np.asarray(model["coef"]))))


def fit_prior(features: np.ndarray, target: np.ndarray, sizes: np.ndarray, c: float = 1.0) -> dict:
    """Logistic regression with fractional targets in [0, 1], each row weighted by its size."""
    from sklearn.linear_model import LogisticRegression

    z = (features - np.asarray(MEAN)) / np.asarray(SCALE)
    x = np.vstack([z, z])
    y = np.r_[np.ones(len(z)), np.zeros(len(z))]
    w = np.r_[sizes * target, sizes * (1 - target)]
    keep = w > 0
    lr = LogisticRegression(C=c, max_iter=1000).fit(x[keep], y[keep], sample_weight=w[keep])
    return dict(intercept=round(float(lr.intercept_[0]), 4), coef=[round(float(v), 4) for v in lr.coef_[0]])


@dataclass
class Calibrator:
    """The prior plus what the annotator's accepted groups taught (prior figure -> observed share)."""
    trust_model: dict = field(default_factory=lambda: PRIOR_TRUST)
    label_model: dict = field(default_factory=lambda: PRIOR_LABEL)
    pseudo: float = PSEUDO_PHOTOS
    decay: float = field(default_factory=lambda: RECENT_DECAY)   # 1.0: every decision weighs the same
    seen_trust: list = field(default_factory=list)   # (prior figure, observed purity, size)
    seen_label: list = field(default_factory=list)   # (prior figure, observed share with the label, size)
    _maps: dict = field(default_factory=dict, repr=False)

    def observe(self, features: np.ndarray, purity: float, size: int, label_share: float | None = None) -> None:
        """One accepted group: its FEATURES when proposed, the share kept, and (when it had a suggestion)
        the share accepted under the suggested label."""
        self.seen_trust.append((float(prior(features, self.trust_model)[0]), float(purity), int(size)))
        if label_share is not None:
            self.seen_label.append((float(prior(features, self.label_model)[0]), float(label_share), int(size)))
        self._maps.clear()

    @property
    def observed_photos(self) -> int:
        return int(sum(s for _, _, s in self.seen_trust))

    def _map(self, which: str, p: np.ndarray) -> np.ndarray:
        seen = self.seen_trust if which == "trust" else self.seen_label
        if not seen:
            return p
        if which not in self._maps:
            q, y, w = (np.array(v, float) for v in zip(*seen))
            # The groups still to come are not like the easy ones used up first: recent decisions weigh more.
            w = w * self.decay ** np.arange(len(w))[::-1]
            # Pseudo-observations on the prior's own diagonal, PSEUDO_PHOTOS in all, spread over the
            # figures seen: with few decisions the figure stays near the prior.
            grid = np.quantile(q, np.linspace(0, 1, 9)) if len(q) > 1 else q
            xs = np.r_[q, grid]
            ys = np.r_[y, grid]
            ws = np.r_[w, np.full(len(grid), self.pseudo / len(grid))]
            lo, hi = float(q.min()), float(q.max())
            self._maps[which] = (isotonic(xs, ys, ws), lo, hi, float(w.sum()))
        (knots, fitted), lo, hi, seen_w = self._maps[which]
        predict = lambda v: np.interp(v, knots, fitted)       # noqa: E731  (flat beyond the ends)
        out = predict(p)
        # Beyond the figures seen, trust the prior's shape: shift it by the gap at the nearest end.
        for edge in (lo, hi):
            side = p < lo if edge == lo else p > hi
            if side.any():
                gap = float(predict(edge)) - edge
                share = seen_w / (seen_w + self.pseudo)
                out[side] = np.clip(p[side] + share * gap, 0.0, 1.0)
        return out

    def trust(self, features: np.ndarray) -> np.ndarray:
        return self._map("trust", prior(features, self.trust_model))

    def confidence(self, features: np.ndarray) -> np.ndarray:
        return self._map("label", prior(features, self.label_model))

    def calibrate(self, graph: Graph, groups: Sequence[tuple[Sequence[int], bool, float | None]]
                  ) -> list[tuple[float, float | None]]:
        """(trust, confidence of the suggested label or None) for each (members, suggested, raw confidence)."""
        if not groups:
            return []
        ranks = entropy_ranks(graph)
        f = np.array([group_features(graph, m, s, c, ranks) for m, s, c in groups])
        t, c = self.trust(f), self.confidence(f)
        # The share carrying one label is never above the share in the majority class.
        # A lone photo is pure by definition.
        t = np.where([len(m) == 1 for m, _, _ in groups], 1.0, t)
        return [(float(ti), float(min(ci, ti)) if s else None) for ti, ci, (_, s, _) in zip(t, c, groups)]


def isotonic(x: np.ndarray, y: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weighted isotonic (non-decreasing) regression of y on x by pooling adjacent violators, y kept in
    [0, 1]: (distinct x, fitted value at each), to be interpolated linearly between them (as
    scikit-learn's IsotonicRegression predicts; tests check the two agree). Plain numpy, so the window's
    engine thread does not import scikit-learn on the first decision."""
    x, y, w = (np.asarray(v, float) for v in (x, y, w))
    keep = w > 0
    x, y, w = x[keep], y[keep], w[keep]
    knots, inv = np.unique(x, return_inverse=True)
    sw = np.bincount(inv, w, len(knots))
    sy = np.bincount(inv, w * y, len(knots)) / sw
    vals, wts, count = [], [], []
    for v, wt in zip(sy, sw):
        vals.append(v)
        wts.append(wt)
        count.append(1)
        while len(vals) > 1 and vals[-2] > vals[-1]:
            v2, w2, c2 = vals.pop(), wts.pop(), count.pop()
            tot = wts[-1] + w2
            vals[-1] = (vals[-1] * wts[-1] + v2 * w2) / tot
            wts[-1] = tot
            count[-1] += c2
    fitted = np.clip(np.repeat(vals, count), 0.0, 1.0)
    return knots, fitted


def purity(classes: Sequence) -> float:
    """The share of the members in the majority class."""
    if not len(classes):
        return 1.0
    _, counts = np.unique(np.asarray(classes), return_counts=True)
    return float(counts.max() / len(classes))


def calibration_error(trust: Sequence[float], purities: Sequence[float], sizes: Sequence[int]) -> float:
    """Photo-weighted mean of |trust - purity| (weights = group sizes)."""
    w = np.asarray(sizes, float)
    return float(np.sum(w * np.abs(np.asarray(trust) - np.asarray(purities))) / max(w.sum(), 1e-12))


def sampling_floor(purities: Sequence[float], sizes: Sequence[int]) -> float:
    """What `calibration_error` would still be if every group's trust were exactly its expected purity:
    a group of n photos, each in the majority class with probability p, shows a purity of X / n with
    X ~ Binomial(n, p), so even a perfect figure misses by E|X / n - p|. Plug-in estimate (p = the
    observed purity), photo-weighted like `calibration_error`. Small impure groups set it: 13 photos
    at purity 0.85 alone give 0.077, above the 0.05 goal; 96 at 0.95 give 0.018."""
    from scipy.stats import binom

    w = np.asarray(sizes, float)
    miss = []
    for n, p in zip(np.asarray(sizes, int), np.asarray(purities, float)):
        k = np.arange(n + 1)
        miss.append(float(np.sum(binom.pmf(k, n, p) * np.abs(k / n - p))))
    return float(np.sum(w * np.asarray(miss)) / max(w.sum(), 1e-12))


def bin_gap(table: list[dict]) -> float:
    """Photo-weighted mean over the bins of |bin trust - bin purity| (the reliability table's gap)."""
    rows = [r for r in table if r["photos"]]
    total = sum(r["photos"] for r in rows)
    return float(sum(r["photos"] * abs(r["trust"] - r["purity"]) for r in rows) / max(total, 1))


BINS = (0.0, 0.8, 0.9, 0.95, 0.99, 1.0000001)


def reliability_table(trust: Sequence[float], purities: Sequence[float], sizes: Sequence[int],
                      bins: Sequence[float] = BINS) -> list[dict]:
    """Per trust bin: groups, photos, photo-weighted mean trust and observed purity."""
    t, p, w = (np.asarray(v, float) for v in (trust, purities, sizes))
    rows = []
    for lo, hi in zip(bins[:-1], bins[1:]):
        sel = (t >= lo) & (t < hi)
        ws = w[sel].sum()
        rows.append(dict(bin=f"{lo:.2f}-{min(hi, 1.0):.2f}", groups=int(sel.sum()), photos=int(ws),
                         trust=float((t[sel] * w[sel]).sum() / ws) if ws else None,
                         purity=float((p[sel] * w[sel]).sum() / ws) if ws else None))
    return rows


def plain_share(x: float) -> str:
    """A share in words: 'nearly all', 'about 8 in 10', 'few'."""
    k = int(round(10 * x))
    if x >= 0.97 or k >= 10:
        return "nearly all"
    return "few" if k <= 0 else f"about {k} in 10"


def plain_words(trust: float) -> str:
    """The trust figure as the annotator reads it: 'about 9 in 10 belong together'."""
    return f"{plain_share(trust)} belong together"


def plain_label(confidence: float) -> str:
    """A suggested label's confidence in words: 'about 8 in 10 carry it'."""
    return f"{plain_share(confidence)} carry it"
