"""Redo: apply again a decision that undo reversed, only right after the undo.

The decision log is append-only, so a redo is a new decision of the undone one's kind, with its photos
and label, that names the undo it reverses in `undoes` (an undo names the decision it reverses there
too; `kind` tells them apart). So the redone decision is an ordinary decision: undo reverses it again,
the labelled-against-actions curve replays it, and `status` counts it as an action again.

What it re-applies is read from the log: the undo recorded, for every photo it changed, the label row
it found, which is the undone decision's outcome. A 'later' re-defers the group's photos; a split cuts
the group again (the cut is deterministic: the same parts come back as new groups).

"Right after an undo": the newest decisions form a run of undos and redos (any other decision ends
the redo history, as in an editor), and the newest undo of that run not yet redone is the one a redo
reverses. Undo, undo, redo, redo re-applies both, oldest first.
"""
from __future__ import annotations

import json


class NothingToRedo(Exception):
    """No undo to reverse; the message says why in one line."""


def pending_undo(store) -> dict | None:
    """The undo a redo would reverse: {id, undoes, before} of the newest undo, in the run of undos
    and redos that ends the log, not redone yet; None when there is none."""
    redone: set[int] = set()
    # Only the trailing run is read, newest first; it ends at the first ordinary decision.
    offset, step = 0, 64
    while True:
        rows = store._all("SELECT id, kind, undoes, before FROM decisions ORDER BY id DESC LIMIT ? OFFSET ?",
                          (step, offset))
        if not rows:
            return None
        for dec_id, kind, undoes, before in rows:
            if undoes is None:
                return None                     # an ordinary decision: nothing after it was undone
            if kind != "undo":
                redone.add(undoes)              # a redo, naming the undo it reversed
            elif dec_id not in redone:
                return dict(id=dec_id, undoes=undoes, before=json.loads(before))
        offset += step


def original(store, decision_id: int) -> dict:
    r = store._one("SELECT id, kind, label, group_id, photos, before FROM decisions WHERE id = ?", (decision_id,))
    return dict(id=r[0], kind=r[1], label=r[2], group_id=r[3], photos=json.loads(r[4]), before=json.loads(r[5]))
