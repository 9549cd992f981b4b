"""Splitting a group once labels exist: the cut follows what the labels say of the members.

Data: scikit-learn's bundled digits (8 x 8 handwritten digits, its own true classes), raw pixels as the
features, through a real Project over them (benchmarks/cached_project.py)."""
from __future__ import annotations

import numpy as np
from sklearn.datasets import load_digits

from benchmarks.cached_project import build_project
from core import proposals


def test_label_split_rule():
    # Rule check (constructed figures): the group's most common top column against the rest, the anchor's
    # side first; no cut when the smaller side is under a fifth of the members.
    prob = np.array([[0.1, 0.8, 0.1]] * 6 + [[0.7, 0.2, 0.1]] * 4)
    part = proposals.label_split(prob)
    assert part.tolist() == [0] * 6 + [1] * 4
    anchor_other = proposals.label_split(prob[::-1])
    assert anchor_other[0] == 0 and anchor_other.sum() == 6
    assert proposals.label_split(np.array([[0.1, 0.8, 0.1]] * 9 + [[0.7, 0.2, 0.1]])) is None


def test_split_follows_the_labels(tmp_path):
    d = load_digits()
    keep = np.flatnonzero(np.isin(d.target, [3, 5]))        # two digits a cut by the pixels alone mixes
    x, y = d.data[keep].astype(np.float32), d.target[keep]
    project, truth = build_project(tmp_path / "p", x, [str(c) for c in y])
    with project:
        paths = project.photos()
        rng = np.random.default_rng(0)
        threes, fives = (rng.permutation(np.flatnonzero(y == c)) for c in (3, 5))
        project.label([paths[i] for i in threes[:40]], "three")
        project.label([paths[i] for i in fives[:40]], "five")
        # A mixed group as the engine could have proposed it: 12 unlabelled threes, then 8 unlabelled fives.
        members = [paths[i] for i in threes[40:52]] + [paths[i] for i in fives[40:48]]
        (gid,) = project.store.update_open_proposals([], [dict(members=members, trust=0.6, kind="new area")])
        parts = project.split(gid)
        assert len(parts) == 2 and sorted(m for q in parts for m in q.members) == sorted(members)
        first, second = parts
        assert first.members[0] == members[0]                 # the anchor's part comes first
        # Each part is (nearly) one digit, and suggests it.
        for part, digit, name in ((first, "3", "three"), (second, "5", "five")):
            share = np.mean([truth[m] == digit for m in part.members])
            assert share >= 0.9, (name, share, len(part.members))
            assert part.suggested_label == name
