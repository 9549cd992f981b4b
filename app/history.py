"""The labelled-photos-against-actions curve (no Qt here).

`Store.decisions()` lists every decision in order with the photos it touched; an undo names the decision
it reverses. The log is replayed once, when a folder opens; after that the window appends one point per
action (`Curve.add`), so drawing the chart never replays the log again.

An undo is not an action: it takes the curve back down without moving it right.
"""
from __future__ import annotations

from typing import Iterable

_NEW_STATE = {"accept": "labelled", "label": "labelled", "set_aside": "set_aside", "clear": None,
              "import": "labelled"}


def labelled_curve(decisions: Iterable[dict]) -> list[tuple[int, int]]:
    """[(actions so far, photos labelled then)], starting at (0, 0); one point per decision, an undo
    adding a point at the same number of actions."""
    state: dict[str, str | None] = {}          # photo -> "labelled" / "set_aside" / None
    before: dict[int, dict[str, str | None]] = {}
    labelled = actions = 0
    points = [(0, 0)]

    def put(photo: str, new: str | None) -> None:
        nonlocal labelled
        old = state.get(photo)
        labelled += (new == "labelled") - (old == "labelled")
        state[photo] = new

    for d in decisions:
        kind = d["kind"]
        if kind in _NEW_STATE:
            before[d["id"]] = {p: state.get(p) for p in d["photos"]}
            for p in d["photos"]:
                put(p, _NEW_STATE[kind])
        elif kind == "undo" and d.get("undoes") in before:
            for p, old in before.pop(d["undoes"]).items():
                put(p, old)
        actions += kind != "undo"
        points.append((actions, labelled))
    return points


class Curve:
    """The curve kept up to date by appending: `add` after each recorded decision."""

    def __init__(self, points: list[tuple[int, int]] | None = None):
        self.points = list(points or [(0, 0)])

    @classmethod
    def from_decisions(cls, decisions: Iterable[dict]) -> "Curve":
        return cls(labelled_curve(decisions))

    @property
    def actions(self) -> int:
        return self.points[-1][0]

    def add(self, kind: str, labelled: int) -> None:
        """One decision of `kind` recorded, leaving `labelled` photos labelled (the engine's count)."""
        self.points.append((self.actions + (kind != "undo"), labelled))
