"""Ordering groups by the calibrated figures: expected photos kept per action from the calibrated trust.

The engine orders groups by *expected photos per action* (core.proposals.expected_yield): expected right
members / (expected wrong members + 1 to accept + 1 to type a label when none is suggested), where the
expected share of right members is the engine's raw figure (mean label confidence of a probable-label
group, the entropy/agreement trust of a new-area group). With ``Settings.order = "calibrated"`` the
share is the calibrated trust instead (core.calibration: the expected purity, a prior refined by the
accepted groups), both where groups are chosen (core.proposals.form_groups: which candidates make a
batch) and where the queue is ranked (core.proposal_queue).

Measured with ``python -m benchmarks.calibrated_order`` (README, trust section); the default stays
``"engine"`` unless the yield figures there support the change.
"""
from __future__ import annotations

from typing import Callable, Sequence

import numpy as np

from core import proposals

ENGINE, CALIBRATED = "engine", "calibrated"
ORDERS = (ENGINE, CALIBRATED)


def expected_yield(trust: float, size: int, suggested: bool) -> float:
    """Expected photos kept per action of a group whose expected purity is `trust`."""
    right = trust * size
    return right / (size - right + 1.0 + (not suggested))


def rescorer(calibrator, graph) -> Callable[[Sequence[proposals.Group]], None]:
    """A function that sets ``extra["expected_yield"]`` (and ``extra["calibrated_trust"]``) of engine
    groups (photo indices into `graph`) from `calibrator`'s trust."""
    def rescore(groups: Sequence[proposals.Group]) -> None:
        if not groups:
            return
        figs = calibrator.calibrate(graph, [(g.members, g.suggested_label is not None, g.confidence)
                                            for g in groups])
        for g, (t, _) in zip(groups, figs):
            g.extra["calibrated_trust"] = t
            g.extra["expected_yield"] = expected_yield(t, len(g.members), g.suggested_label is not None)
    return rescore


def check(order: str) -> str:
    if order not in ORDERS:
        raise ValueError(f"unknown group order {order!r}; choose from {', '.join(ORDERS)}")
    return order


def ranked_yields(calibrator, graph, items: Sequence[tuple[Sequence[int], bool, float | None]]) -> np.ndarray:
    """Calibrated expected photos per action of (members, suggested, raw confidence) groups."""
    figs = calibrator.calibrate(graph, list(items))
    return np.array([expected_yield(t, len(m), s) for (m, s, _), (t, _) in zip(items, figs)])
