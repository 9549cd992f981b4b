"""`LabelState`: where every catalogued photo stands, as numpy arrays the proposals read directly.

Per photo (row of the project's catalogue): `state` (FREE / LABELLED / SET_ASIDE), `label_of` (index
into `names`, -1 when not labelled), `deferred` (left for later) and, per label, "not this label"
(the photo was taken out of that label's group). `names` is the sorted list of the labels some photo
in the store carries.

Built once from the store's tables when the catalogue is loaded; after that each committed decision
updates it IN PLACE through the store's `after_commit` hook (`apply`), touching only the photos the
decision changed — never a rebuild from the tables per action. A label that appears or disappears
re-indexes `label_of` with one vectorised step.
"""
from __future__ import annotations

from collections import Counter
from typing import Sequence

import numpy as np

from core.store import LabelRow, Store

FREE, LABELLED, SET_ASIDE = 0, 1, 2     # the values of `state` (core.proposals uses the same)


class LabelState:
    def __init__(self, fingerprints: Sequence[str], labels: dict[str, LabelRow], rejections: Counter,
                 deferred: set[str], decisions: int):
        """`fingerprints`: one per catalogue row; `labels`: the store's label rows by fingerprint;
        `rejections`: Counter of (fingerprint, label) pairs; `deferred`: deferred fingerprints;
        `decisions`: how many decisions the log holds."""
        n = len(fingerprints)
        # The row of each content: an int, or a list of rows when several paths share one content.
        self._rows_of: dict[str, int | list[int]] = dict(zip(fingerprints, range(n)))
        if len(self._rows_of) != n:
            shared: dict[str, list[int]] = {}
            for i, fp in enumerate(fingerprints):
                shared.setdefault(fp, []).append(i)
            self._rows_of.update((fp, rows) for fp, rows in shared.items() if len(rows) > 1)
        self._labels = dict(labels)
        self._rejections = Counter(rejections)
        self._deferred = set(deferred)
        self.decisions = decisions
        self._count = Counter(r.label for r in self._labels.values() if r.state == "labelled")
        self.names: list[str] = sorted(self._count)
        self._pos = {name: i for i, name in enumerate(self.names)}
        self.state = np.zeros(n, np.int8)
        self.label_of = np.full(n, -1, np.int64)
        self.deferred = np.zeros(n, bool)
        # Filled in one vectorised step per array (only the labelled / set aside / deferred photos are
        # looked at, never every row in Python).
        rows, state, label_of = [], [], []
        for fp, lr in self._labels.items():
            r = self._rows_of.get(fp)
            if r is None:
                continue
            k = 1 if isinstance(r, int) else len(r)
            rows.append(r) if k == 1 else rows.extend(r)
            labelled = lr.state == "labelled"
            state += [LABELLED if labelled else SET_ASIDE] * k
            label_of += [self._pos[lr.label] if labelled else -1] * k
        self.state[rows] = state
        self.label_of[rows] = label_of
        deferred = []
        for fp in self._deferred:
            r = self._rows_of.get(fp)
            if r is not None:
                deferred.append(r) if isinstance(r, int) else deferred.extend(r)
        self.deferred[deferred] = True
        self._not_label: np.ndarray | None = None      # built on demand, dropped when it changes

    @classmethod
    def load(cls, store: Store, fingerprints: Sequence[str]) -> "LabelState":
        """Read the tables once (at open, after a scan)."""
        rej = Counter(store.rejection_pairs())
        return cls(fingerprints, store.labels(), rej, set(store.deferred()), store.decision_count())

    def __len__(self) -> int:
        return len(self.state)

    # -- reading ---------------------------------------------------------------------------------
    def row(self, fingerprint: str) -> LabelRow | None:
        """The label row of a photo (None: unlabelled)."""
        return self._labels.get(fingerprint)

    def arrays(self) -> tuple[np.ndarray, np.ndarray, list[str]]:
        """(state, label_of, names) — copies, so a caller may keep them while decisions go on."""
        return self.state.copy(), self.label_of.copy(), list(self.names)

    def not_label(self) -> np.ndarray:
        """(photos, labels) bool: True where the annotator said the photo is not that label."""
        if self._not_label is None:
            m = np.zeros((len(self.state), len(self.names)), bool)
            for (fp, lab), c in self._rejections.items():
                if c > 0 and lab in self._pos and fp in self._rows_of:
                    m[self._rows_of[fp], self._pos[lab]] = True
            self._not_label = m
        return self._not_label

    def counts(self) -> dict[str, int]:
        """Photos of the catalogue per label."""
        lab = self.label_of[self.state == LABELLED]
        per = np.bincount(lab, minlength=len(self.names))
        return {name: int(c) for name, c in zip(self.names, per) if c}

    # -- the after_commit hook -------------------------------------------------------------------
    def apply(self, changes: list[tuple]) -> None:
        """Update in place from what one committed transaction changed (see Store.after_commit)."""
        for change in changes:
            what = change[0]
            if what == "labels":
                self._apply_labels(change[1])
            elif what == "rejected":
                for pair in change[1]:
                    pair = tuple(pair)
                    self._rejections[pair] += 1
                    self._mark_not_label(pair, True)
            elif what == "unrejected":
                for pair in change[1]:
                    pair = tuple(pair)
                    self._rejections[pair] -= 1
                    if self._rejections[pair] <= 0:
                        del self._rejections[pair]
                        self._mark_not_label(pair, False)
            elif what == "deferred":
                for fp, t in change[1].items():
                    self._set_deferred(fp, t is not None)
            elif what == "decision":
                self.decisions += 1

    def _mark_not_label(self, pair: tuple, on: bool) -> None:
        """Keep a built "not this label" matrix in step with one pair (only the photo's rows)."""
        fp, lab = pair
        if self._not_label is not None and lab in self._pos and fp in self._rows_of:
            self._not_label[self._rows_of[fp], self._pos[lab]] = on

    def _apply_labels(self, changes: dict[str, LabelRow | None]) -> None:
        for fp, new in changes.items():
            old = self._labels.pop(fp, None)
            if old is not None and old.state == "labelled":
                self._count[old.label] -= 1
                if self._count[old.label] <= 0:
                    del self._count[old.label]
            if new is not None:
                self._labels[fp] = new
                if new.state == "labelled":
                    self._count[new.label] += 1
        names = sorted(self._count)
        if names != self.names:
            self._reindex(names)
        for fp, new in changes.items():
            self._set_deferred(fp, False)           # a decision on a photo ends its 'later'
            rows = self._rows_of.get(fp)
            if rows is not None:
                self._set_rows(rows, new)

    def _reindex(self, names: list[str]) -> None:
        """New label list: map every label index to its new place (labels gone map to -1; no photo
        of the catalogue carries them any more)."""
        pos = {name: i for i, name in enumerate(names)}
        remap = np.array([pos.get(name, -1) for name in self.names] + [-1], np.int64)
        self.label_of = remap[self.label_of]          # -1 indexes the trailing -1
        self.names, self._pos = names, pos
        self._not_label = None

    def _set_rows(self, rows: int | list[int], lr: LabelRow | None) -> None:
        if lr is None:
            self.state[rows] = FREE
            self.label_of[rows] = -1
        elif lr.state == "labelled":
            self.state[rows] = LABELLED
            self.label_of[rows] = self._pos[lr.label]
        else:
            self.state[rows] = SET_ASIDE
            self.label_of[rows] = -1

    def _set_deferred(self, fp: str, on: bool) -> None:
        if on:
            self._deferred.add(fp)
        else:
            self._deferred.discard(fp)
        rows = self._rows_of.get(fp)
        if rows is not None:
            self.deferred[rows] = on
