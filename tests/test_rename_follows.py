"""A held group's suggested label follows a label rename, its undo and its redo (core/label_rename.py:
`follow_undo`, `follow_redo`), in the API and in the window (F2 rename, Ctrl+Z, Ctrl+Shift+Z as key
events, offscreen). The demo folder's groups, accepted in the order Kinfold proposes them, give a held
group with a suggestion after a few accepts."""
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")  # before any Qt import

from PySide6.QtCore import Qt

from core.project import Project
from tests.test_window_labels import shown
from tests.test_window_session import CTRL, focus, make_window, open_and_wait, press, settle, type_text

SHIFT = Qt.KeyboardModifier.ShiftModifier


def held(p):
    return p.propose(limit=3, hold=1)[0]


def test_suggestion_follows_rename_undo_redo_api(demo_folder):
    with Project.open(demo_folder, annotator="tester") as p:
        for k in range(8):
            g = held(p)
            if g.suggested_label:
                break
            p.accept(g.id, f"lab{k}")
        old = g.suggested_label
        assert old, "no held group came with a suggestion"
        p.rename_label(old, "renamed one", confirm=True)
        assert held(p).id == g.id and held(p).suggested_label == "renamed one"
        assert p.undo()["kind"] == "rename"
        assert held(p).id == g.id and held(p).suggested_label == old
        assert p.redo()["kind"] == "rename"
        assert held(p).id == g.id and held(p).suggested_label == "renamed one"
        assert p.undo()["kind"] == "rename"
        assert held(p).suggested_label == old
        # A merge undone: both names are labels again; the suggestion keeps a live label.
        other = next(n for n in p.status().by_label if n != old)
        p.rename_label(old, other)
        assert held(p).suggested_label == other
        p.undo()
        assert held(p).suggested_label in p.status().by_label


def test_window_shows_the_suggestion_following_rename_undo_redo(qtbot, tmp_path, demo_folder):
    w = make_window(qtbot, tmp_path)
    open_and_wait(qtbot, w, demo_folder)
    for k in range(8):
        if w.current().suggested_label:
            break
        focus(w.group_page.grid)
        w.group_page.label.setText(f"lab{k}")
        w.group_page.confirm_unseen = lambda: True
        press(Qt.Key.Key_Return)
        settle(qtbot, w)
    old = w.current().suggested_label
    assert old, "no held group came with a suggestion"
    gid = w.current().id

    side = w.side.labels
    row = next(i for i in range(side.count()) if side.item(i).data(Qt.ItemDataRole.UserRole) == old)
    focus(side)
    side.setCurrentRow(row)
    press(Qt.Key.Key_F2)
    dlg = shown(qtbot, lambda: w.last_rename)
    type_text("renamed one")
    press(Qt.Key.Key_Return)
    if dlg.isVisible():                          # close to an existing name: keep it as typed
        press(Qt.Key.Key_Return)
    settle(qtbot, w)

    def shows(name):
        assert w.current().id == gid and w.current().suggested_label == name
        assert f"suggested label “{name}”" in w.group_page.detail.text()

    shows("renamed one")
    focus(w.group_page.grid)
    press(Qt.Key.Key_Z, CTRL)
    settle(qtbot, w)
    assert w.project.store.decisions()[-1]["kind"] == "undo"
    shows(old)
    focus(w.group_page.grid)
    press(Qt.Key.Key_Z, CTRL | SHIFT)
    settle(qtbot, w)
    assert w.project.store.decisions()[-1]["kind"] == "rename"
    shows("renamed one")
