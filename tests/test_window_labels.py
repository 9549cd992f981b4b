"""The window's import dialog (Ctrl+Shift+I) and label renaming (F2, right-click Rename…), driven by key
events delivered to the focused widget as a window system delivers them; each result checked on a
second Store reading the same file.

Outside reference: the conftest folder's photos are five variants of each of six scikit-image sample
photos under a/ and b/, so the subfolder names and file names are known classes; the CSV is written by
Python's csv module."""
import csv
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")  # before any Qt import

from PySide6.QtCore import QPoint, Qt
from PySide6.QtWidgets import QApplication

from core.project import Project
from tests.test_window_session import CTRL, focus, make_window, open_and_wait, press, reader, settle, target, type_text

SHIFT = Qt.KeyboardModifier.ShiftModifier


def shown(qtbot, get):
    """Wait for the dialog `get()` returns to be on screen, then activate it, as a window manager does
    with a newly shown dialog (Qt's offscreen platform does not)."""
    qtbot.waitUntil(lambda: get() is not None and get().isVisible(), timeout=10_000)
    dlg = get()
    dlg.activateWindow()
    QApplication.processEvents()
    return dlg


def test_import_dialog_checks_then_imports_by_keys(qtbot, tmp_path, photo_project_folder):
    folder = photo_project_folder
    with open(tmp_path / "labels.csv", "w", newline="", encoding="utf-8") as f:
        out = csv.writer(f)
        out.writerow(["image", "class"])
        out.writerows([["a/chelsea_0.jpg", "cat"], ["a/chelsea_1.jpg", "cat"], ["b/ghost.jpg", "cat"]])
    w = make_window(qtbot, tmp_path)
    open_and_wait(qtbot, w, folder)
    store, fp = reader(folder)
    assert any("Ctrl+Shift+I" in keys for _, rows in w.help.sections for keys, _ in rows)

    focus(w.group_page.grid)
    press(Qt.Key.Key_I, CTRL | SHIFT)
    dlg = shown(qtbot, lambda: w.last_import)
    assert target() is dlg.source                 # the path is typed first, with no click
    type_text(str(tmp_path / "labels.csv"))
    press(Qt.Key.Key_Return)                      # the default button: Check (a dry run)
    qtbot.waitUntil(lambda: dlg.checked is not None, timeout=30_000)
    text = dlg.report.toPlainText()
    assert text.startswith("dry run: nothing was imported")
    assert "b/ghost.jpg" in text and "no such photo in the folder" in text
    assert store.labels() == {}                  # nothing written by the check
    assert dlg.run.isEnabled() and target() is dlg.run

    press(Qt.Key.Key_Return)                      # Import, now the default and focused
    qtbot.waitUntil(lambda: dlg.imported is not None, timeout=30_000)
    settle(qtbot, w)
    assert {store.labels()[fp[p]].label for p in ("a/chelsea_0.jpg", "a/chelsea_1.jpg")} == {"cat"}
    assert store.labels()[fp["a/chelsea_0.jpg"]].how == "import"
    assert w.status.by_label == {"cat": 2}
    assert store.decisions()[-1]["kind"] == "import"

    # Changing a setting withdraws the checked report; the subfolder names need no path.
    dlg.kinds["subfolders"].setChecked(True)
    assert not dlg.run.isEnabled()
    focus(dlg.check)
    press(Qt.Key.Key_Space)
    qtbot.waitUntil(lambda: dlg.checked is not None, timeout=30_000)
    assert "conflicts    2 carry another label" in dlg.report.toPlainText()
    press(Qt.Key.Key_Escape)
    qtbot.waitUntil(lambda: not dlg.isVisible(), timeout=5_000)

    # Ctrl+Z in the window takes the whole import back in one step.
    focus(w.group_page.grid)
    press(Qt.Key.Key_Z, CTRL)
    settle(qtbot, w)
    assert store.labels() == {} and w.status.labelled == 0


def test_f2_renames_and_merges_with_one_question(qtbot, tmp_path, photo_project_folder):
    folder = photo_project_folder
    with Project.open(folder) as p:
        p.import_labels(subfolders=True)          # a: 15, b: 15
        p.label(["b/coins_0.jpg"], "coin")
    w = make_window(qtbot, tmp_path)
    open_and_wait(qtbot, w, folder)
    store, fp = reader(folder)

    # The review page: the label list's current label, F2, a new name, Return.
    focus(w.group_page.grid)
    press(Qt.Key.Key_R, CTRL)
    settle(qtbot, w)
    assert w.stack.currentWidget() is w.review_page
    focus(w.review_page.labels)
    w.review_page.labels.setCurrentRow(0)        # "a"
    press(Qt.Key.Key_F2)
    shown(qtbot, lambda: w.last_rename)
    assert target() is w.last_rename.field
    type_text("portraits")                       # replaces the selected old name
    press(Qt.Key.Key_Return)
    settle(qtbot, w)
    assert w.status.by_label == {"b": 14, "coin": 1, "portraits": 15}
    assert store.labels()[fp["a/astronaut_0.jpg"]].label == "portraits"
    assert store.decisions()[-1]["kind"] == "rename"
    assert w.review_page.header.text().startswith("“portraits”")

    # "Coin" is close to "coin": asked once; the second Return keeps "Coin" ... but first, Merge.
    items = [w.review_page.labels.item(i).data(Qt.ItemDataRole.UserRole) for i in range(w.review_page.labels.count())]
    w.review_page.labels.setCurrentRow(items.index("b"))
    focus(w.review_page.labels)
    press(Qt.Key.Key_F2)
    dlg = shown(qtbot, lambda: w.last_rename if w.last_rename.old == "b" else None)
    type_text("Coin")
    press(Qt.Key.Key_Return)
    assert dlg.isVisible() and dlg.merge.isVisible() and "close to “coin”" in dlg.note.text()
    assert store.decisions()[-1]["kind"] == "rename" and w.status.by_label["b"] == 14   # nothing yet
    focus(dlg.merge)
    press(Qt.Key.Key_Space)                      # Merge into "coin"
    settle(qtbot, w)
    assert w.status.by_label == {"coin": 15, "portraits": 15}

    # Undo takes the merge back; then right-click Rename… in the side panel, keeping the close name.
    press(Qt.Key.Key_Z, CTRL)
    settle(qtbot, w)
    assert w.status.by_label == {"b": 14, "coin": 1, "portraits": 15}
    w.back_to_groups()
    side = w.side.labels
    row = next(i for i in range(side.count()) if side.item(i).data(Qt.ItemDataRole.UserRole) == "b")
    pos = side.visualItemRect(side.item(row)).center()
    from PySide6.QtTest import QTest
    QTest.mouseClick(side.viewport(), Qt.MouseButton.RightButton, pos=pos)
    QApplication.processEvents()
    if w.last_label_menu is None:                # a platform that sends no context-menu event for a click
        side.customContextMenuRequested.emit(pos)
    qtbot.waitUntil(lambda: w.last_label_menu is not None and w.last_label_menu.isVisible(), timeout=5_000)
    menu = w.last_label_menu
    assert [a.text() for a in menu.actions()] == ["Rename…"]
    press(Qt.Key.Key_Down)
    press(Qt.Key.Key_Return)
    shown(qtbot, lambda: w.last_rename if w.last_rename.old == "b" else None)
    type_text("Coin")
    press(Qt.Key.Key_Return)                     # asked once ...
    press(Qt.Key.Key_Return)                     # ... and kept as typed
    settle(qtbot, w)
    assert w.status.by_label == {"Coin": 14, "coin": 1, "portraits": 15}
