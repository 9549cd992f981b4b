"""Browsing every photo, neighbours with labels, redo after undo, keep-only-the-selected (core + CLI).

The browse results are checked against a listing made without Kinfold's query: the folder walked with
os.walk (the photos on disk) and each photo's state read back one by one with `Project.photo_info`."""
import json
import os
import subprocess
import sys

import pytest

from core.project import Project, ProjectError


def walked(folder) -> list[str]:
    """The readable photos on disk, as relative POSIX paths (the broken JPEG and the text file left out)."""
    out = []
    for root, dirs, files in os.walk(folder):
        dirs[:] = [d for d in dirs if not d.startswith(".")]
        for f in files:
            rel = os.path.relpath(os.path.join(root, f), folder).replace(os.sep, "/")
            if f.endswith(".jpg") and f != "broken.jpg":
                out.append(rel)
    return sorted(out)


def test_browse_filters_match_an_independent_listing(photo_project_folder):
    with Project.open(photo_project_folder, annotator="tester") as p:
        p.label(["a/chelsea_0.jpg", "a/chelsea_1.jpg", "b/coffee_2.jpg"], "cat or coffee")
        p.label(["b/rocket_3.jpg"], "rocket")
        p.set_aside(["a/camera_4.jpg"])
        everything = p.browse()
        assert [b.path for b in everything.photos] == walked(photo_project_folder)
        assert everything.total == 30
        info = {b.path: p.photo_info(b.path) for b in everything.photos}
        expected_state = {"labelled": "labelled", "set_aside": "aside", "unlabelled": "unlabelled"}
        for b in everything.photos:
            assert (b.state, b.label) == (expected_state[info[b.path]["state"]], info[b.path]["label"])

        def same(found, keep):
            want = [q for q in walked(photo_project_folder) if keep(q)]
            assert [b.path for b in found.photos] == want and found.total == len(want)

        same(p.browse(state="labelled"), lambda q: info[q]["state"] == "labelled")
        same(p.browse(state="aside"), lambda q: info[q]["state"] == "set_aside")
        same(p.browse(state="unlabelled"), lambda q: info[q]["state"] == "unlabelled")
        same(p.browse(label="cat or coffee"), lambda q: info[q]["label"] == "cat or coffee")
        same(p.browse(subfolder="b"), lambda q: q.startswith("b/"))
        same(p.browse(subfolder="b/"), lambda q: q.startswith("b/"))
        same(p.browse(subfolder="."), lambda q: "/" not in q)
        same(p.browse(subfolder="B"), lambda q: False)                          # folder names keep their case
        same(p.browse(name="CHELSEA"), lambda q: "chelsea" in q.split("/")[-1])
        same(p.browse(name="_3"), lambda q: "_3" in q.split("/")[-1])          # "_" is no wildcard
        same(p.browse(name="a/"), lambda q: False)                              # the folder is not the name
        same(p.browse(state="unlabelled", subfolder="a", name="c"),
             lambda q: info[q]["state"] == "unlabelled" and q.startswith("a/") and "c" in q.split("/")[-1])
        # Pages: offset and limit cut the same ordered list, the total stays.
        page = p.browse(offset=7, limit=5)
        assert [b.path for b in page.photos] == walked(photo_project_folder)[7:12] and page.total == 30
        assert p.browse(offset=29, limit=5).photos[0].path == walked(photo_project_folder)[29]
        assert p.subfolders() == [("a", 15), ("b", 15)]
        with pytest.raises(ProjectError, match="state 'done' is not one of"):
            p.browse(state="done")


def test_neighbours_come_with_their_labels(photo_project_folder):
    with Project.open(photo_project_folder, annotator="tester") as p:
        near = p.neighbours("a/chelsea_0.jpg", 4)
        p.label([near[0][0]], "cat")
        p.set_aside([near[1][0]])
        got = p.neighbours_labelled("a/chelsea_0.jpg", 4)
        assert [(q, s) for q, s, _, _ in got] == near
        assert got[0][2:] == ("labelled", "cat") and got[1][2:] == ("aside", None)
        assert all(g[2:] == ("unlabelled", None) for g in got[2:])


def state(p):
    s = p.status()
    return s.labelled, s.set_aside, s.by_label, s.actions


def test_redo_after_undo_walks_forward_again(photo_project_folder):
    with Project.open(photo_project_folder, annotator="tester") as p:
        with pytest.raises(ProjectError, match="nothing to redo"):
            p.redo()                                       # nothing undone yet
        g = p.propose(limit=3)[0]
        p.accept(g.id, "first", drop=g.members[-1:])
        after_accept = state(p)
        p.label(["b/rocket_0.jpg", "b/rocket_1.jpg"], "rocket")
        p.set_aside(["a/camera_0.jpg"])
        after_all = state(p)
        p.undo(); p.undo(); p.undo()
        assert state(p)[:3] == (0, 0, {})
        assert p.redo()["kind"] == "accept"                # oldest undone first: the order they were made in
        assert state(p)[:3] == after_accept[:3]
        assert not p.store.is_open(g.id)                   # the group is decided again
        assert p.store.rejections() == {p.photo_info(g.members[-1])["fingerprint"]: {"first"}}
        assert p.redo()["kind"] == "label" and p.redo()["kind"] == "set_aside"
        assert state(p)[:3] == after_all[:3]               # the same labels again
        assert state(p)[3] == after_all[3] + 3             # a redo is a decision, counted as an action
        with pytest.raises(ProjectError, match="nothing to redo"):
            p.redo()
        # A redone decision is an ordinary one: undo reverses it, redo applies it again.
        p.undo()
        assert p.photo_info("a/camera_0.jpg")["state"] == "unlabelled"
        p.redo()
        assert p.photo_info("a/camera_0.jpg")["state"] == "set_aside"


def test_redo_of_an_import_style_rename(photo_project_folder):
    """Redo works for every undoable kind; a rename (helper "import") as an example."""
    with Project.open(photo_project_folder, annotator="tester") as p:
        if not hasattr(p, "rename_label"):
            pytest.skip("no rename in this build")
        p.label(["a/chelsea_0.jpg", "a/chelsea_1.jpg"], "cat")
        p.rename_label("cat", "feline", confirm=True)
        p.undo()
        assert p.browse(label="cat").total == 2
        assert p.redo()["kind"] == "rename"
        assert p.browse(label="feline").total == 2 and p.browse(label="cat").total == 0


def test_redo_refused_once_a_new_decision_follows_the_undo(photo_project_folder):
    with Project.open(photo_project_folder, annotator="tester") as p:
        p.label(["b/rocket_0.jpg"], "rocket")
        p.undo()
        p.label(["b/coins_0.jpg"], "coins")             # a new decision ends the redo history
        with pytest.raises(ProjectError, match="nothing to redo"):
            p.redo()
        assert p.photo_info("b/rocket_0.jpg")["state"] == "unlabelled"


def test_redo_of_later_and_split(photo_project_folder):
    with Project.open(photo_project_folder, annotator="tester") as p:
        g = p.propose(limit=3)[0]
        p.defer(g.id)
        p.undo()
        assert p.propose(limit=1)[0].id == g.id            # undo brings the group back first
        assert p.redo()["kind"] == "later"
        assert not p.store.is_open(g.id) and set(p.store.deferred()) >= {
            p.photo_info(m)["fingerprint"] for m in g.members}


def test_redo_of_split(demo_folder):
    with Project.open(demo_folder, annotator="tester") as p:
        big = next(x for x in p.propose(limit=20) if x.splittable)
        parts = [q.members for q in p.split(big.id)]
        p.undo()
        assert p.store.is_open(big.id)
        assert p.redo()["kind"] == "split"
        assert not p.store.is_open(big.id)
        assert [q.members for q in p.propose(limit=2)] == parts   # the same parts, shown first again


def test_cli_redo_as_a_subprocess(photo_project_folder):
    def kinfold(verb, *rest):
        return subprocess.run([sys.executable, "-m", "app.cli", verb, str(photo_project_folder), *rest],
                              capture_output=True, text=True, timeout=120)
    r = kinfold("redo")
    assert r.returncode == 1 and r.stderr.strip().count("\n") == 0 and "nothing to redo" in r.stderr
    assert "Traceback" not in r.stderr
    assert kinfold("label", "rocket", "b/rocket_0.jpg").returncode == 0
    assert kinfold("undo").returncode == 0
    r = kinfold("redo", "--json")
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["kind"] == "label"
    r = kinfold("browse", "--state", "labelled", "--json")
    assert [b["path"] for b in json.loads(r.stdout)["photos"]] == ["b/rocket_0.jpg"]
    with Project.open(photo_project_folder) as p:
        assert p.photo_info("b/rocket_0.jpg")["label"] == "rocket"


def test_number_keys_are_the_most_used_labels():
    from collections import Counter

    from core.label_names import number_keys
    counts = Counter({f"label {i:02d}": (i * 7) % 13 + 1 for i in range(14)})
    keys = number_keys(dict(counts))
    # Checked against the standard library's ranking (ties by name, as the sheet shows them).
    ranked = sorted(counts.most_common(), key=lambda kv: (-kv[1], kv[0]))[:9]
    assert keys == {name: i + 1 for i, (name, _) in enumerate(ranked)}
    assert number_keys({"a": 3, "b": 0}) == {"a": 1} and number_keys({}) == {}


def test_keep_only_these_then_accept_labels_only_the_kept(qtbot, tmp_path, photo_project_folder):
    """Ctrl+K through the window, then the store: the photos taken out before Ctrl+K are the ones
    labelled, the rest are recorded as 'not this label'."""
    from PySide6.QtCore import QSettings, Qt

    from app.main_window import MainWindow
    w = MainWindow(QSettings(str(tmp_path / "s.ini"), QSettings.Format.IniFormat))
    qtbot.addWidget(w)
    w.show()
    with qtbot.waitSignal(w.groups_shown, timeout=180_000):
        w.open_folder(str(photo_project_folder))
    g = w.current()
    grid = w.group_page.grid
    grid.setFocus()
    for row in (0, 1):
        grid.setCurrentIndex(w.group_model.index(row))
        qtbot.keyClick(grid, Qt.Key.Key_Space)
    qtbot.keyClick(grid, Qt.Key.Key_K, Qt.KeyboardModifier.ControlModifier)
    assert w.group_model.taken_out() == g.members[2:]
    w.group_page.label.setText("kept")
    w.group_page.confirm_unseen = lambda: True
    qtbot.keyClick(grid, Qt.Key.Key_Return)
    qtbot.waitUntil(w.idle, timeout=60_000)
    w.close_folder()
    with Project.open(photo_project_folder) as p:
        assert p.browse(label="kept").total == 2
        assert sorted(b.path for b in p.browse(label="kept").photos) == sorted(g.members[:2])
        rejected = p.store.rejections()
        assert {p.photo_info(m)["fingerprint"] for m in g.members[2:]} == {fp for fp, labs in rejected.items()
                                                                          if "kept" in labs}
