"""The Project verbs: decisions, persistence, undo, bad input, and the catalogue's bookkeeping."""
import json
import shutil
import subprocess
import sys
from collections import Counter

import numpy as np
import pytest

from core import project
from core.project import Project, ProjectError


def truth_of(path: str) -> str:
    return path.split("/")[-1].split("_")[0]


def test_scan_reports_broken_and_non_image_files(photo_project_folder):
    with Project.open(photo_project_folder) as p:
        rep = p.scan()
        reasons = dict(rep.skipped)
        assert rep.photos == 30
        assert "truncated" in reasons["b/broken.jpg"] or "cut short" in reasons["b/broken.jpg"]
        assert reasons["notes.txt"].startswith("not a photo")
        assert rep.embedded == 0          # everything was embedded by the template scan


def test_proposals_are_disjoint_capped_and_ordered(photo_project_folder):
    with Project.open(photo_project_folder) as p:
        groups = p.propose(limit=20)
        seen = Counter(m for g in groups for m in g.members)
        assert seen and max(seen.values()) == 1           # a photo sits in at most one group
        assert all(1 <= len(g.members) <= 48 for g in groups)
        assert all(0.0 <= g.trust <= 1.0 for g in groups)
        assert sum(seen.values()) == 30                    # every photo is proposed somewhere
        # The six source photos are far apart: the first groups are each one source photo's variants.
        first = groups[0]
        assert len({truth_of(m) for m in first.members}) == 1 and len(first.members) >= 3


def test_accept_with_drop_and_suggested_label_and_reopen(photo_project_folder):
    with Project.open(photo_project_folder, annotator="ana") as p:
        g = p.propose(limit=5)[0]
        cls = truth_of(g.members[0])
        p.accept(g.id, cls, drop=g.members[-1:])
        st = p.status()
        assert st.by_label == {cls: len(g.members) - 1}
        with pytest.raises(ProjectError, match="no longer open"):
            p.accept(g.id, cls)
        # The dropped photo was said not to be `cls`, so it is never proposed under that label.
        for h in p.propose(limit=20):
            if g.members[-1] in h.members:
                assert h.suggested_label != cls or h.kind == "new area"
    # Decisions survive closing and reopening.
    with Project.open(photo_project_folder) as p:
        st = p.status()
        assert st.by_label == {cls: len(g.members) - 1}
        log = p.store.decisions()
        assert log[-1]["kind"] == "accept" and log[-1]["annotator"] == "ana" and log[-1]["label"] == cls


def test_undo_walks_back_several_steps(photo_project_folder):
    with Project.open(photo_project_folder) as p:
        g1 = p.propose(limit=5)[0]
        p.accept(g1.id, "first")
        g2 = p.propose(limit=5)[0]
        p.accept(g2.id, "second")
        p.set_aside([p.propose(limit=1)[0].members[0]])
        assert p.status().set_aside == 1
        assert p.undo()["kind"] == "set_aside"
        assert p.status().set_aside == 0 and set(p.status().by_label) == {"first", "second"}
        assert p.undo()["kind"] == "accept"
        assert set(p.status().by_label) == {"first"}
        # The undone group comes back first, as it was.
        assert p.propose(limit=3)[0].members == g2.members
        assert p.undo()["kind"] == "accept"
        assert p.status().labelled == 0
        assert p.undo() is None


def test_label_relabel_clear_and_review(photo_project_folder):
    with Project.open(photo_project_folder) as p:
        photos = p.photos()
        cats = [q for q in photos if truth_of(q) == "chelsea"]
        p.label(cats + ["b/coins_0.jpg"], "cat")
        review = p.review("cat")
        assert review[0][0] == "b/coins_0.jpg"             # the odd one out is least typical
        p.label(["b/coins_0.jpg"], "coins")
        assert p.status().by_label == {"cat": 5, "coins": 1}
        assert p.store.labels()[p.photo_info("b/coins_0.jpg")["fingerprint"]].how == "relabel"
        p.clear(["b/coins_0.jpg"])
        assert p.status().by_label == {"cat": 5}
        with pytest.raises(ProjectError, match="not a photo"):
            p.label(["nope.jpg"], "x")
        with pytest.raises(ProjectError, match="empty"):
            p.label(cats, "   ")


def test_split_gives_two_parts_shown_first(photo_project_folder):
    with Project.open(photo_project_folder) as p:
        photos = p.photos()
        mixed = [q for q in photos if truth_of(q) in ("chelsea", "rocket")]
        # Make a mixed group the way the engine would offer one: through a stored proposal.
        gid = p.store.update_open_proposals((), [dict(members=mixed, trust=0.5, kind="new area")])[0]
        parts = p.split(gid)
        assert len(parts) == 2
        assert sorted(m for g in parts for m in g.members) == sorted(mixed)
        assert all(len({truth_of(m) for m in g.members}) == 1 for g in parts)
        nxt = p.propose(limit=5)
        assert [g.id for g in nxt[:2]] == [g.id for g in parts]
        # Undo brings the whole group back first, in place of its parts.
        assert p.undo()["kind"] == "split"
        again = p.propose(limit=5)
        assert again[0].id == gid and again[0].members == mixed
        assert not {g.id for g in parts} & {g.id for g in again}
        # A group too small to split is refused with the reason; nothing is logged.
        small = p.store.update_open_proposals((), [dict(members=mixed[:3], trust=0.5, kind="new area")])[0]
        decisions = p.store.decision_count()
        with pytest.raises(ProjectError, match="at least 8"):
            p.split(small)
        assert p.store.decision_count() == decisions


def test_rename_keeps_label_and_edit_reembeds(photo_project_folder):
    with Project.open(photo_project_folder) as p:
        p.label(["a/chelsea_0.jpg"], "cat")
    (photo_project_folder / "a" / "chelsea_0.jpg").rename(photo_project_folder / "moved.jpg")
    shutil.copy(photo_project_folder / "b" / "rocket_1.jpg", photo_project_folder / "new.jpg")
    with open(photo_project_folder / "b" / "coins_0.jpg", "ab") as f:
        f.write(b"\0")                                     # same photo, different bytes
    with Project.open(photo_project_folder) as p:
        rep = p.scan()
        assert rep.new == 2 and rep.changed == 1 and rep.removed == 1
        assert rep.embedded == 1                           # new.jpg has rocket_1's bytes: already embedded
        assert p.photo_info("moved.jpg")["label"] == "cat"
        assert p.status().photos == 31


def test_second_open_is_refused_while_locked(photo_project_folder):
    with Project.open(photo_project_folder):
        with pytest.raises(ProjectError, match="already open"):
            Project.open(photo_project_folder)
    Project.open(photo_project_folder).close()


def test_separate_store_for_read_only_folder(photo_project_folder, tmp_path):
    store = tmp_path / "elsewhere"
    with Project.open(photo_project_folder, store=store) as p:
        assert p.store.directory == store.resolve()


def test_core_imports_without_qt():
    # The engine imports neither Qt nor the front ends; the command line (app/cli.py) imports no Qt.
    code = ("import sys, pkgutil, importlib, core; "
            "[importlib.import_module('core.' + m.name) for m in pkgutil.iter_modules(core.__path__)]; "
            "bad = [m for m in sys.modules if m.startswith(('PySide6', 'shiboken6', 'PyQt', 'app'))]; "
            "import app.cli; bad += [m for m in sys.modules if m.startswith(('PySide6', 'shiboken6'))]; "
            "print(bad); sys.exit(1 if bad else 0)")
    assert subprocess.run([sys.executable, "-c", code]).returncode == 0


def test_cli_round_trip_and_bad_input(photo_project_folder, tmp_path):
    def kinfold(*args):
        return subprocess.run([sys.executable, "-m", "app.cli", *args], capture_output=True, text=True)

    r = kinfold("propose", str(photo_project_folder), "--json", "--limit", "3")
    assert r.returncode == 0, r.stderr
    groups = json.loads(r.stdout)
    g = groups[0]
    assert all(x["splittable"] == (len(x["members"]) >= 8) for x in groups)
    r = kinfold("accept", str(photo_project_folder), str(g["id"]), "thing", "--json")
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["by_label"] == {"thing": len(g["members"])}
    csv_path = tmp_path / "out.csv"
    r = kinfold("export", str(photo_project_folder), "--csv", str(csv_path), "--json")
    assert r.returncode == 0 and json.loads(r.stdout)["csv"]["rows"] == len(g["members"])
    r = kinfold("status", str(tmp_path / "missing"))
    assert r.returncode == 1 and r.stderr.count("\n") == 1 and "not a folder" in r.stderr
    r = kinfold("accept", str(photo_project_folder), "99999", "x")
    assert r.returncode == 1 and "no group 99999" in r.stderr


def test_store_schema_version_and_wal(photo_project_folder):
    with Project.open(photo_project_folder) as p:
        from core.store import SCHEMA_VERSION

        assert p.store.schema_version() == SCHEMA_VERSION
        # WAL keeps readers (a second `kinfold status`) from blocking on the writer (SQLite docs).
        assert p.store._db.execute("PRAGMA journal_mode").fetchone()[0] == "wal"


def test_group_numbers_stay_until_decided(scanned_demo, tmp_path):
    """Issue 16: a proposed group keeps its number across proposals, reopening, the CLI and the window,
    and the first groups do not depend on --limit (the README quick start relies on it)."""
    def kinfold(*args):
        r = subprocess.run([sys.executable, "-m", "app.cli", *map(str, args)], capture_output=True, text=True)
        assert r.returncode == 0, r.stderr
        return r.stdout

    def shown(groups):
        return [(g["id"], g["members"]) if isinstance(g, dict) else (g.id, g.members) for g in groups]

    # Fresh copies of one state: the groups formed do not depend on how many are asked for.
    fresh = []
    for n in (1, 2, 3, 7):
        folder = tmp_path / f"fresh{n}"
        shutil.copytree(scanned_demo, folder)
        fresh.append(shown(json.loads(kinfold("propose", folder, "--json", "--limit", n))))
    assert [len(f) for f in fresh] == [1, 2, 3, 7]
    assert all(f == fresh[-1][: len(f)] for f in fresh)
    # One folder, asked again and again: the same groups under the same numbers.
    folder = tmp_path / "fresh7"
    for n in (1, 2, 3):
        assert shown(json.loads(kinfold("propose", folder, "--json", "--limit", n))) == fresh[-1][:n]
    with Project.open(folder) as p:
        first = p.propose(limit=7)
        assert shown(first) == fresh[-1]
        assert shown(p.propose(limit=7)) == shown(first)
        # Deciding one group leaves the others' numbers alone.
        p.accept(first[1].id, "drawer part")
        rest = {g.id: g.members for g in p.propose(limit=20)}
        assert all(rest[g.id] == g.members for g in first if g.id != first[1].id)
        assert first[1].id not in rest
        before_close = shown(p.propose(limit=20))
    # Reopened: the same.
    with Project.open(folder) as p:
        assert shown(p.propose(limit=20)) == before_close
    # A number shown earlier is accepted by the CLI, and the others keep theirs.
    status = json.loads(kinfold("accept", folder, first[2].id, "spring", "--json"))
    assert status["by_label"]["spring"] == len(first[2].members)
    after = dict(shown(json.loads(kinfold("propose", folder, "--json", "--limit", 100))))
    assert all(after[i] == m for i, m in before_close if i != first[2].id)
    with Project.open(folder) as p:
        assert all(p.group(i).members == m and p.store.is_open(i) for i, m in before_close if i != first[2].id)


def test_groups_only_peeked_at_are_formed_again_after_a_decision(photo_project_folder):
    with Project.open(photo_project_folder) as p:
        first, *peeked = p.propose(limit=3, hold=1)
        assert peeked
        # Asked again before any decision: the very same groups.
        assert [(g.id, g.members) for g in p.propose(limit=3, hold=1)] == [(first.id, first.members)] + [
            (g.id, g.members) for g in peeked]
        p.accept(first.id, "thing")
        p.propose(limit=3, hold=1)
        assert not any(p.store.is_open(g.id) for g in peeked)
        # Held groups (the default) stay open under their ids after a decision.
        first, *held = p.propose(limit=3)
        p.accept(first.id, "other")
        p.propose(limit=3)
        assert all(p.store.is_open(g.id) and p.group(g.id).members == g.members for g in held)


def test_fresh_scan_counts_new_photos_not_files_left_out(tmp_path):
    """'345 photos ready (346 new …)' was reported: a file found new and then left out (a truncated
    JPEG) counted as new. New counts photos ready; the file is listed among the skipped."""
    from .conftest import _photo_folder

    folder = _photo_folder(tmp_path / "photos")              # 30 photos, a truncated JPEG, a text file
    with Project.open(folder, annotator="tester") as p:
        rep = p.scan()
    assert rep.new == rep.photos == 30
    assert {path for path, _ in rep.skipped} == {"b/broken.jpg", "notes.txt"}


def test_scan_progress_counts_across_chunks(tmp_path, monkeypatch):
    """The scan embeds in chunks (a crash loses at most one); its progress, figures and words alike,
    counts across the whole scan, and says "done" once, at the end."""
    import re

    import core.scanning
    from tests.conftest import _photo_folder

    monkeypatch.setattr(core.scanning, "EMBED_CHUNK", 7)       # 30 photos: five chunks
    folder = _photo_folder(tmp_path / "photos")
    seen: list[tuple[int, int, str]] = []
    with Project.open(folder) as p:
        rep = p.scan(progress=lambda done, total, message: seen.append((done, total, message)))
    embedding = [s for s in seen if "embedded" in s[2]]
    assert rep.embedded == 30 and len(embedding) > 5
    totals = {total for _, total, _ in embedding}
    assert len(totals) == 1
    total = totals.pop()
    dones = [done for done, _, _ in embedding]
    assert dones == sorted(dones) and dones[-1] == total
    for done, _, message in embedding[:-1]:
        m = re.fullmatch(r"embedded (\d+) of (\d+) photos", message)
        assert m, message                                          # no chunk's closing words midway
        assert int(m[2]) == total and int(m[1]) <= done
    assert max(int(m.split()[1]) for _, _, m in embedding[:-1]) > 7  # counted past the first chunk
    last = re.fullmatch(r"done: (\d+) embedded, (\d+) could not be read", embedding[-1][2])
    assert last and int(last[1]) == rep.embedded and int(last[1]) + int(last[2]) == total


def test_status_actions_leave_undo_out_as_the_window_chart_does(photo_project_folder):
    """The window's chart counted 17 actions where `status` said 18: an undo takes an action back,
    it is not one (app/history.py draws it that way). Both now count decisions without undos."""
    from app.history import labelled_curve

    with Project.open(photo_project_folder, annotator="tester") as p:
        p.label(["a/chelsea_0.jpg"], "cat")
        p.label(["a/chelsea_1.jpg"], "cat")
        p.undo()
        st = p.status()
        assert st.actions == 2 and st.labelled == 1
        assert labelled_curve(p.store.decisions())[-1] == (st.actions, st.labelled)
