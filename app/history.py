"""The labelled-photos-against-actions curve, replayed from the decision log (no Qt here).

`Store.decisions()` lists every decision in order with the photos it touched; an undo names the decision
it reverses. Replaying that log gives the number of labelled photos after each action.
"""
from __future__ import annotations

from typing import Iterable

_LABELS = ("accept", "label")


def labelled_curve(decisions: Iterable[dict]) -> list[tuple[int, int]]:
    """[(actions so far, photos labelled then)], starting at (0, 0); one point per decision."""
    state: dict[str, str | None] = {}          # photo -> "labelled" / "set_aside" / None
    before: dict[int, dict[str, str | None]] = {}
    labelled = 0
    points = [(0, 0)]

    def put(photo: str, new: str | None) -> None:
        nonlocal labelled
        old = state.get(photo)
        labelled += (new == "labelled") - (old == "labelled")
        state[photo] = new

    for n, d in enumerate(decisions, 1):
        kind = d["kind"]
        new = {"accept": "labelled", "label": "labelled", "set_aside": "set_aside", "clear": None}
        if kind in new:
            before[d["id"]] = {p: state.get(p) for p in d["photos"]}
            for p in d["photos"]:
                put(p, new[kind])
        elif kind == "undo" and d.get("undoes") in before:
            for p, old in before.pop(d["undoes"]).items():
                put(p, old)
        points.append((n, labelled))
    return points
