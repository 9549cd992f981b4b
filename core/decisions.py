"""Decisions: the verbs that change labels, each ONE store transaction — its label changes, its log
entry and its effect on the proposals are written together or not at all (a refused or failed one
changes nothing). The label state (core/label_state.py) follows each committed decision through the
store's after_commit hook; a decision reads it instead of the label table.

Each function takes the `Project` (its lock held by the caller, `Project.<verb>`)."""
from __future__ import annotations

import unicodedata
from typing import Sequence

import numpy as np

from core import mistakes, proposals
from core.errors import ProjectError
from core.group import Group
from core.store import LabelRow

UNDOABLE = ("accept", "label", "set_aside", "clear", "split", "later", "confirm", "import", "rename")


def clean_label(label: str) -> str:
    if not isinstance(label, str):
        raise ProjectError("a label must be text")
    label = unicodedata.normalize("NFC", " ".join(label.split()))
    if not label:
        raise ProjectError("a label cannot be empty")
    if any(unicodedata.category(ch).startswith("C") for ch in label):
        raise ProjectError(f"label {label!r} contains control characters")
    if len(label) > 200:
        raise ProjectError("a label is at most 200 characters")
    return label


def accept(project, group_id: int, label: str, drop: Sequence[str] = ()) -> int:
    """Label every member of the group but those in `drop` (they go back to the pool)."""
    label = clean_label(label)
    with project.store.transaction():
        row = project._open_group(group_id)
        drop = set(drop)
        unknown = drop - set(row.members)
        if unknown:
            raise ProjectError(f"{sorted(unknown)[0]} is not a member of group {group_id}")
        keep = [m for m in row.members if m not in drop and m in project._index]
        known = project.label_state
        keep = [m for m in keep if known.row(project._rows[project._index[m]].fingerprint) is None]
        changes = {project._rows[project._index[m]].fingerprint: project._new_row(
            project._rows[project._index[m]].fingerprint, "labelled", label, "group") for m in keep}
        rejected = [project._rows[project._index[m]].fingerprint for m in drop if m in project._index]
        return project.store.record_decision("accept", project.annotator, keep, changes, label=label,
                                             group_id=group_id, close_proposals=[group_id], rejected=rejected)


def label(project, paths: Sequence[str], label: str) -> int:
    """Label photos directly (one or many); relabels photos that already carry a label."""
    label = clean_label(label)
    idx = project._paths_to_indices(paths)
    with project.store.transaction():
        known = project.label_state
        changes = {}
        for i in idx:
            fp = project._rows[i].fingerprint
            how = "relabel" if known.row(fp) is not None else "single"
            changes[fp] = project._new_row(fp, "labelled", label, how)
        return project.store.record_decision("label", project.annotator, [project._rows[i].path for i in idx], changes,
                                             label=label)


def set_aside(project, paths: Sequence[str]) -> int:
    """Mark photos as belonging to no class; they are never proposed again (undo brings them back)."""
    idx = project._paths_to_indices(paths)
    changes = {project._rows[i].fingerprint: project._new_row(project._rows[i].fingerprint, "set_aside", None,
                                                              "set aside") for i in idx}
    return project.store.record_decision("set_aside", project.annotator, [project._rows[i].path for i in idx], changes)


def clear(project, paths: Sequence[str]) -> int:
    """Remove labels (or set-aside marks) so the photos return to the pool."""
    idx = project._paths_to_indices(paths)
    changes = {project._rows[i].fingerprint: None for i in idx}
    return project.store.record_decision("clear", project.annotator, [project._rows[i].path for i in idx], changes)


def split(project, group_id: int) -> list[Group]:
    """Break a group into two coherent parts; they come back first in the next proposals."""
    row = project._open_group(group_id)
    members = [m for m in row.members if m in project._index]
    if len(members) < proposals.MIN_SPLIT:
        raise ProjectError(f"group {group_id} has {len(members)} photos; splitting needs at least "
                           f"{proposals.MIN_SPLIT} (take the odd ones out instead)")
    g = project.graph()
    idx = [project._index[m] for m in members]
    # Once labels exist they cut along the classes better than the geometry alone (the relearned
    # classifier was fitted on them): yield_replay Fashion-MNIST 10,000 7.839 -> 8.189 (README).
    part, prob, names = _label_split(project, g, idx)
    if part is None:
        part = proposals.split_members(g.rows(idx))
    parts = [[m for m, p in zip(members, part) if p == k] for k in (0, 1)]
    # The part holding the anchor keeps its place first.
    if members[0] in parts[1]:
        parts.reverse()
    records = [dict(members=pm, trust=row.trust, suggested_label=row.suggested_label,
                    confidence=row.confidence, kind="split part") for pm in parts if pm]
    if prob is not None:       # cut by the labels: each part suggests the label most of its members have
        at = {m: i for i, m in enumerate(members)}
        for r in records:
            rows = prob[[at[m] for m in r["members"]]]
            col = int(np.bincount(rows.argmax(1), minlength=rows.shape[1]).argmax())
            known = col < len(names)
            r["suggested_label"] = names[col] if known else None
            r["confidence"] = round(float(rows[:, col].mean()), 4) if known else None
    with project.store.transaction():
        project._open_group(group_id)          # still open now that the write lock is held
        project.store.record_decision("split", project.annotator, members, {}, group_id=group_id)
        ids = project.store.add_pinned_proposals(records, close=group_id)
    return [Group(i, r["members"], r["trust"], r["suggested_label"], r["confidence"], r["kind"])
            for i, r in zip(ids, records)]


def _label_split(project, graph, idx: list[int]):
    """(`proposals.label_split` of the members, their rows of the label probabilities, the label names)
    once labels exist and tell the members apart; (None, None, None) otherwise."""
    state, label_of, names = project.label_arrays()
    if not names or not (state == proposals.LABELLED).any():
        return None, None, None
    prob = proposals.label_probabilities(graph, state, label_of, len(names), proposals.Settings(),
                                         project.label_state.not_label(), project.label_classifier(names),
                                         names, rows=idx)
    part = proposals.label_split(prob)
    return (None, None, None) if part is None else (part, prob, names)


def defer(project, group_id: int) -> int:
    """Leave a group for later: its photos come back after everything else has been proposed.
    Logged as a 'later' decision; undo brings the group back first. Returns the decision id."""
    with project.store.transaction():
        row = project._open_group(group_id)
        members = [m for m in row.members if m in project._index]
        previous = project.store.defer(project._rows[project._index[m]].fingerprint for m in members)
        return project.store.record_decision("later", project.annotator, members, {}, group_id=group_id,
                                             close_proposals=[group_id], before=previous)


def undo(project) -> dict | None:
    """Reverse the newest decision not yet undone: a label change, a split (the whole group comes
    back first) or a 'later' (the group comes back first). Repeat to walk further back.
    Returns what was undone (`photos`: how many photos it gave back), or None when there is
    nothing left to undo."""
    with project.store.transaction():
        last = project.store.last_undoable_of(UNDOABLE)
        if last is None:
            return None
        dec_id, kind, before, group_id = last
        if kind == "later":
            project.store.record_decision("undo", project.annotator, [], {}, undoes=dec_id)
            project.store.restore_deferred(before)
            photos = len(before)
        else:
            changes = {fp: (LabelRow(fp, *prev) if prev else None) for fp, prev in before.items()}
            project.store.record_decision("undo", project.annotator, [], changes, undoes=dec_id)
            photos = len(changes)
            if kind == "rename":            # open groups' suggestions follow the name back
                from core import label_rename
                label_rename.follow_undo(project, dec_id)
        if kind in ("accept", "later") and group_id is not None:
            project.store.repin_proposal(group_id)  # the group comes back first, as it was
        elif kind == "split" and group_id is not None:
            # The parts still open give way to the whole group again.
            whole = project.store.proposal(group_id)
            members = set(whole.members) if whole else set()
            parts = [r.id for r in project.store.open_proposals(pinned_only=True)
                     if r.kind == "split part" and set(r.members) <= members]
            project.store.repin_proposal(group_id, close=parts)
            photos = len(members)
    return {"decision": dec_id, "kind": kind, "photos": photos}


def confirm(project, paths: Sequence[str], label: str | None = None) -> int:
    """The annotator says the label is right (with `label`: the right label is this one, a fix):
    the photos leave the likely-mistakes queue (until a later decision changes their label).
    One logged decision (kind 'confirm'), undoable; returns its id."""
    label = None if label is None else clean_label(label)
    idx = project._paths_to_indices(paths)
    with project.store.transaction():
        known = project.label_state
        changes = {}
        for i in idx:
            fp = project._rows[i].fingerprint
            lr = known.row(fp)
            if label is None and (lr is None or lr.state != "labelled"):
                raise ProjectError(f"{project._rows[i].path} has no label to confirm")
            changes[fp] = project._new_row(fp, "labelled", label or lr.label, mistakes.CONFIRMED)
        return project.store.record_decision("confirm", project.annotator, [project._rows[i].path for i in idx],
                                             changes, label=label)
