"""Labelling statistics from the decision log: photos per label, labels per hour, how often the
suggested label was accepted as it was, each per annotator.

Definitions (README, "Statistics", says the same):

- *Photos per label*: photos carrying each label now (set-aside photos are not a label).
- *Labels given*: photos named in `accept` and `label` decisions that were not undone. A photo
  labelled twice counts twice: this measures work, not the result.
- *Active time*: the sum of the gaps between an annotator's consecutive decisions, each gap capped
  at ``IDLE_CAP`` seconds (a longer gap is a break, counted as ``IDLE_CAP``), plus ``IDLE_CAP`` for
  the first decision of each sitting. *Labels per hour* = labels given / active hours.
- *Per clock hour*: labels given in each UTC hour (``2026-12-05T07``), for the bar of a day's work.
- *Suggestions*: `accept` decisions (not undone) of groups that came with a suggested label.
  *As suggested*: the label given is the suggested one and no member was taken out.

Everything is computed from what the store records: the log's kinds, times, annotators, the
proposals' suggested labels and the members taken out of each accepted group.
"""
from __future__ import annotations

import csv
import io
import os
from dataclasses import dataclass, field
from datetime import datetime, timezone

IDLE_CAP = 300.0                 # seconds: a longer pause between two decisions is a break
LABELLING_KINDS = ("accept", "label")
CSV_HEADER = ("figure", "annotator", "key", "value")


@dataclass
class AnnotatorFigures:
    annotator: str
    actions: int = 0                      # decisions, undos left out
    labels_given: int = 0
    active_seconds: float = 0.0
    suggested: int = 0                    # accepted groups that came with a suggested label
    as_suggested: int = 0                 # ... accepted with that label and nothing taken out

    @property
    def labels_per_hour(self) -> float | None:
        return self.labels_given * 3600.0 / self.active_seconds if self.active_seconds > 0 else None

    @property
    def as_suggested_share(self) -> float | None:
        return self.as_suggested / self.suggested if self.suggested else None


@dataclass
class Statistics:
    photos: int
    by_label: dict[str, int]                                  # label -> photos now, most first
    annotators: list[AnnotatorFigures] = field(default_factory=list)
    per_hour: dict[str, int] = field(default_factory=dict)    # "YYYY-MM-DDTHH" (UTC) -> labels given

    @property
    def total(self) -> AnnotatorFigures:
        t = AnnotatorFigures("everyone")
        for a in self.annotators:
            t.actions += a.actions
            t.labels_given += a.labels_given
            t.active_seconds += a.active_seconds
            t.suggested += a.suggested
            t.as_suggested += a.as_suggested
        return t

    def as_dict(self) -> dict:
        def fig(a: AnnotatorFigures) -> dict:
            return dict(annotator=a.annotator, actions=a.actions, labels_given=a.labels_given,
                        active_hours=round(a.active_seconds / 3600.0, 4),
                        labels_per_hour=None if a.labels_per_hour is None else round(a.labels_per_hour, 2),
                        suggested=a.suggested, as_suggested=a.as_suggested,
                        as_suggested_share=None if a.as_suggested_share is None
                        else round(a.as_suggested_share, 4))
        return dict(photos=self.photos, by_label=dict(self.by_label), per_hour=dict(self.per_hour),
                    total=fig(self.total), annotators=[fig(a) for a in self.annotators])

    def csv_text(self) -> str:
        """The figures as one RFC 4180 table (CRLF line ends): figure, annotator, key, value."""
        out = io.StringIO()
        w = csv.writer(out, lineterminator="\r\n")
        w.writerow(CSV_HEADER)
        for label, n in self.by_label.items():
            w.writerow(("photos", "", _text_cell(label), n))
        for hour, n in self.per_hour.items():
            w.writerow(("labels in hour", "", hour, n))
        # The first block is everyone together (annotator cell empty), then one block per annotator.
        for who, a in [("", self.total)] + [(_text_cell(a.annotator), a) for a in self.annotators]:
            w.writerow(("actions", who, "", a.actions))
            w.writerow(("labels given", who, "", a.labels_given))
            w.writerow(("active hours", who, "", f"{a.active_seconds / 3600.0:.4f}"))
            w.writerow(("labels per hour", who, "", "" if a.labels_per_hour is None else f"{a.labels_per_hour:.2f}"))
            w.writerow(("suggestions", who, "", a.suggested))
            w.writerow(("accepted as suggested", who, "", a.as_suggested))
        return out.getvalue()


    def write_csv(self, path) -> None:
        """Write `csv_text()` to `path` whole: a temporary beside it, then one rename (an existing
        file is replaced; callers ask first)."""
        path = os.fspath(path)
        tmp = f"{path}.kinfold-tmp-{os.getpid()}"
        try:
            with open(tmp, "w", encoding="utf-8", newline="") as f:
                f.write(self.csv_text())
            os.replace(tmp, path)
        finally:
            if os.path.exists(tmp):
                os.unlink(tmp)


def _text_cell(text: str) -> str:
    # A spreadsheet runs a cell starting with one of these as a formula (as in core/export.py).
    return "'" + text if text.startswith(("=", "+", "-", "@", "\t", "\r")) else text


def _parse_time(text) -> datetime | None:
    """The log's UTC time (`core.store.utc_now`); None for a time it cannot read (counted as no time)."""
    try:
        return datetime.strptime(str(text), "%Y-%m-%dT%H:%M:%SZ").replace(tzinfo=timezone.utc)
    except ValueError:
        return None


def compute(by_label: dict[str, int], photos: int, decisions: list[dict], suggested_of: dict[int, str | None],
            taken_out: dict[int, int]) -> Statistics:
    """`decisions`: the log in order (`Store.decisions()`); `suggested_of`: group id -> its
    suggested label; `taken_out`: decision id -> members taken out of that accepted group."""
    undone = {d["undoes"] for d in decisions if d["kind"] == "undo" and d["undoes"] is not None}
    figures: dict[str, AnnotatorFigures] = {}
    last_time: dict[str, datetime] = {}
    per_hour: dict[str, int] = {}
    for d in decisions:
        if d["kind"] == "undo":
            continue
        who = d["annotator"]
        a = figures.setdefault(who, AnnotatorFigures(who))
        a.actions += 1
        when = _parse_time(d["time"])
        if when is not None:
            prev = last_time.get(who)
            gap = IDLE_CAP if prev is None else (when - prev).total_seconds()
            a.active_seconds += min(max(gap, 0.0), IDLE_CAP)
            last_time[who] = when
        if d["id"] in undone:
            continue
        if d["kind"] in LABELLING_KINDS:
            n = len(d["photos"])
            a.labels_given += n
            if when is not None:
                hour = when.strftime("%Y-%m-%dT%H")
                per_hour[hour] = per_hour.get(hour, 0) + n
        if d["kind"] == "accept" and d["group_id"] is not None:
            suggestion = suggested_of.get(d["group_id"])
            if suggestion:
                a.suggested += 1
                if d["label"] == suggestion and not taken_out.get(d["id"], 0):
                    a.as_suggested += 1
    ordered = dict(sorted(by_label.items(), key=lambda kv: (-kv[1], kv[0])))
    return Statistics(photos, ordered, sorted(figures.values(), key=lambda a: a.annotator),
                      dict(sorted(per_hour.items())))


def from_store(store, by_label: dict[str, int], photos: int) -> Statistics:
    """Read what `compute` needs from a `core.store.Store`."""
    decisions = store.decisions()
    groups = {d["group_id"] for d in decisions if d["kind"] == "accept" and d["group_id"] is not None}
    suggested_of = {}
    for gid in groups:
        row = store.proposal(gid)
        suggested_of[gid] = row.suggested_label if row else None
    return compute(by_label, photos, decisions, suggested_of, store.taken_out_counts())
