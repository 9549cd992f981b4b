"""Renaming a label, and merging two (a rename onto a label that already exists).

Every photo carrying the old label takes the new one in ONE decision of kind ``rename`` (logged,
undone as one step by `Project.undo`); each photo keeps how it was labelled (``how``), so a confirmed
label stays confirmed. Exports read the labels, so they follow. "Not this label" marks (photos taken
out of a group suggesting the old label) are carried over to the new name, and open groups suggesting
the old label suggest the new one.

A new name that is not an existing label but differs from one only by case, spacing, punctuation or
as a prefix (`core.label_names.near_duplicates`) raises `NameQuestion` unless ``confirm=True``: the
CLI and the window turn it into one question ("merge into 'washer', or create 'Washer'?").
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

from core.label_names import near_duplicates
from core.project import ProjectError

if TYPE_CHECKING:
    from core.project import Project

KIND = "rename"


class NameQuestion(ProjectError):
    """The new name is close to existing labels; ask the user once, then call again with confirm=True
    (to keep the name as typed) or with one of `near` as the new name (to merge). A caller that does
    not ask shows it as the one-line refusal it also is."""

    def __init__(self, new: str, near: list[str]):
        self.new, self.near = new, list(near)
        shown = ", ".join(repr(n) for n in self.near)
        super().__init__(f"{new!r} is close to the existing label {shown} (case, spacing or a prefix): "
                         f"rename onto {self.near[0]!r} to merge, or confirm {new!r} as a new label")


@dataclass
class RenameResult:
    old: str
    new: str
    photos: int              # photos whose label changed
    merged: bool             # the new name already existed
    decision: int


def rename_label(project: "Project", old: str, new: str, confirm: bool = False) -> RenameResult:
    from core.project import clean_label

    new = clean_label(new)
    with project._mutex, project.store.transaction() as db:
        labels = project.store.labels()
        existing = sorted({r.label for r in labels.values() if r.state == "labelled"})
        if old not in existing:
            cleaned = clean_label(old) if isinstance(old, str) and old.strip() else old
            if cleaned in existing:
                old = cleaned
            else:
                raise ProjectError(f"no photo carries the label {old!r}" +
                                   (f"; the labels are: {', '.join(existing)}" if existing else ""))
        if new == old:
            raise ProjectError(f"the label is already called {old!r}")
        merged = new in existing
        if not merged and not confirm:
            near = near_duplicates(new, [n for n in existing if n != old])
            if near:
                raise NameQuestion(new, near)
        carrying = [fp for fp, r in labels.items() if r.state == "labelled" and r.label == old]
        changes = {fp: project._new_row(fp, "labelled", new, labels[fp].how) for fp in carrying}
        fps = set(carrying)
        photos = [r.path for r in project._rows if r.fingerprint in fps]
        rejected = [fp for fp, names in project.store.rejections().items() if old in names]
        decision = project.store.record_decision(KIND, project.annotator, photos, changes, label=new,
                                                 rejected=rejected)
        db.execute("UPDATE proposals SET suggested_label=? WHERE suggested_label=? AND open=1", (new, old))
    return RenameResult(old, new, len(photos), merged, decision)


def follow_undo(project: "Project", decision_id: int) -> None:
    """An undo of the rename `decision_id` was just recorded (same transaction): open groups suggesting
    the new name suggest the old one again, if no photo carries the new name any more (a plain rename
    undone). After an undone merge both names are labels again and the suggestions are left as they are."""
    row = project.store._one("SELECT label, before FROM decisions WHERE id = ?", (decision_id,))
    if row is None:
        return
    import json
    new, before = row[0], json.loads(row[1])
    old = next((r[1] for r in before.values() if r), None)
    if old is None or new is None or old == new:
        return
    still = project.store._one("SELECT 1 FROM labels WHERE state = 'labelled' AND label = ? LIMIT 1", (new,))
    if still is None:
        _map_open_suggestions(project, new, old)


def follow_redo(project: "Project", old: str, new: str) -> None:
    """A rename from `old` to `new` was applied again by redo: open groups follow it, as they did the
    first time."""
    _map_open_suggestions(project, old, new)


def _map_open_suggestions(project: "Project", frm: str, to: str) -> None:
    with project.store.transaction() as db:
        db.execute("UPDATE proposals SET suggested_label=? WHERE suggested_label=? AND open=1", (to, frm))
