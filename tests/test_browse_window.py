"""The browse page, the preview's zoom/pan/steps/take-out, number keys, redo and keep-only-these in the
window, driven by real key and mouse events on the widgets (offscreen).

The folder: scikit-image's sample photos in two subfolders (tests/conftest.py). What the window shows
is checked against a listing made without Kinfold's browse query (the folder walked on disk, each
photo's state read back with `Project.photo_info`) and against what the store recorded."""
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")  # before any Qt import

import pytest
from PySide6.QtCore import QSettings, Qt

from app.main_window import MainWindow
from core.project import Project
from tests.test_browse_redo import walked

C = Qt.KeyboardModifier.ControlModifier
CS = Qt.KeyboardModifier.ControlModifier | Qt.KeyboardModifier.ShiftModifier


@pytest.fixture
def labelled_folder(photo_project_folder):
    """Some photos labelled and one set aside before the window opens."""
    with Project.open(photo_project_folder, annotator="tester") as p:
        p.label([f"a/chelsea_{k}.jpg" for k in range(5)], "cat")
        p.label(["b/coffee_0.jpg", "b/coffee_1.jpg"], "coffee")
        p.set_aside(["a/camera_4.jpg"])
    return photo_project_folder


@pytest.fixture
def w(qtbot, tmp_path, labelled_folder):
    win = MainWindow(QSettings(str(tmp_path / "settings.ini"), QSettings.Format.IniFormat))
    qtbot.addWidget(win)
    win.show()
    win.activateWindow()
    qtbot.waitExposed(win)
    with qtbot.waitSignal(win.groups_shown, timeout=180_000):
        assert win.open_folder(str(labelled_folder))
    yield win
    win.close_folder()


def idle(qtbot, w):
    qtbot.waitUntil(w.idle, timeout=60_000)


def key(qtbot, widget, k, mods=Qt.KeyboardModifier.NoModifier):
    qtbot.keyClick(widget, k, mods)
    qtbot.wait(10)
    idle(qtbot, widget.window() if isinstance(widget.window(), MainWindow) else widget.parent().window())


def browse_shows(qtbot, w, expected: list[str]):
    model = w.browse_model
    qtbot.waitUntil(lambda: model.paths == expected, timeout=20_000)
    assert w.browse_page.total == len(expected)


def test_browse_filters_name_box_and_labelling(qtbot, w, labelled_folder):
    on_disk = walked(labelled_folder)
    key(qtbot, w.group_page.grid, Qt.Key.Key_B, C)
    page = w.browse_page
    assert w.stack.currentWidget() is page
    browse_shows(qtbot, w, on_disk)
    # The cards show the subfolder (in the path) and the state or label.
    i = w.browse_model.paths.index("a/chelsea_0.jpg")
    assert w.browse_model.notes[i] == "“cat” · a/"
    assert w.browse_model.notes[w.browse_model.paths.index("a/camera_4.jpg")] == "set aside · a/"
    assert w.browse_model.notes[w.browse_model.paths.index("b/rocket_0.jpg")] == "no label · b/"
    info = {q: w.project.photo_info(q) for q in on_disk}
    # State filter, by keyboard on the combo box: All, Not labelled, Labelled, Set aside.
    page.state.setFocus()
    key(qtbot, page.state, Qt.Key.Key_Down)
    browse_shows(qtbot, w, [q for q in on_disk if info[q]["state"] == "unlabelled"])
    key(qtbot, page.state, Qt.Key.Key_Down)
    browse_shows(qtbot, w, [q for q in on_disk if info[q]["state"] == "labelled"])
    key(qtbot, page.state, Qt.Key.Key_Down)
    browse_shows(qtbot, w, ["a/camera_4.jpg"])
    key(qtbot, page.state, Qt.Key.Key_Home)                          # all photos again
    browse_shows(qtbot, w, on_disk)
    # Label filter.
    qtbot.waitUntil(lambda: page.label_filter.count() == 3)           # any, cat, coffee
    page.label_filter.setFocus()
    key(qtbot, page.label_filter, Qt.Key.Key_End)                     # "coffee"
    browse_shows(qtbot, w, ["b/coffee_0.jpg", "b/coffee_1.jpg"])
    key(qtbot, page.label_filter, Qt.Key.Key_Home)
    # Subfolder filter (the list is read from the engine when the page opens).
    qtbot.waitUntil(lambda: page.folder.count() == 3)                 # every folder, a, b
    page.folder.setFocus()
    key(qtbot, page.folder, Qt.Key.Key_End)
    browse_shows(qtbot, w, [q for q in on_disk if q.startswith("b/")])
    key(qtbot, page.folder, Qt.Key.Key_Home)
    browse_shows(qtbot, w, on_disk)
    # Ctrl+F focuses the name box; typing filters by file name.
    page.grid.setFocus()
    key(qtbot, page.grid, Qt.Key.Key_F, C)
    assert page.name.hasFocus()
    qtbot.keyClicks(page.name, "rocket")
    browse_shows(qtbot, w, [q for q in on_disk if "rocket" in q.split("/")[-1]])
    # Label two of them from here: click, Ctrl+click, type the label, Return.
    grid = page.grid
    key(qtbot, page.name, Qt.Key.Key_Escape)                            # back to the photos
    assert grid.hasFocus()
    for row, mods in ((0, Qt.KeyboardModifier.NoModifier), (2, C)):
        qtbot.mouseClick(grid.viewport(), Qt.MouseButton.LeftButton, mods,
                         grid.visualRect(w.browse_model.index(row)).center())
    assert page.selected_paths() == ["b/rocket_0.jpg", "b/rocket_2.jpg"]
    page.new_label.setFocus()
    qtbot.keyClicks(page.new_label, "rocket")
    key(qtbot, page.new_label, Qt.Key.Key_Return)
    idle(qtbot, w)
    assert w.project.photo_info("b/rocket_0.jpg")["label"] == "rocket"
    assert w.project.photo_info("b/rocket_2.jpg")["label"] == "rocket"
    assert w.project.photo_info("b/rocket_1.jpg")["state"] == "unlabelled"
    qtbot.waitUntil(lambda: w.browse_model.notes[0] == "“rocket” · b/", timeout=20_000)
    # Relabel one and set one aside from the browse page too.
    qtbot.mouseClick(grid.viewport(), Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier,
                     grid.visualRect(w.browse_model.index(1)).center())
    qtbot.mouseClick(page.aside, Qt.MouseButton.LeftButton)
    idle(qtbot, w)
    assert w.project.photo_info("b/rocket_1.jpg")["state"] == "set_aside"
    assert w.project.store.decisions()[-1]["kind"] == "set_aside"
    # Esc goes back to the groups.
    grid.setFocus()
    key(qtbot, grid, Qt.Key.Key_Escape)
    assert w.stack.currentWidget() is w.work


def test_number_keys_fill_the_label_field(qtbot, w):
    items = [w.side.labels.item(i).text() for i in range(w.side.labels.count())]
    # Most used first: cat has 5 photos, coffee 2.
    assert items[0].startswith("1   cat") and items[1].startswith("2   coffee")
    grid = w.group_page.grid
    grid.setFocus()
    key(qtbot, grid, Qt.Key.Key_2)
    assert w.group_page.label.text() == "coffee" and grid.hasFocus()
    key(qtbot, grid, Qt.Key.Key_1)
    assert w.group_page.label.text() == "cat"
    key(qtbot, grid, Qt.Key.Key_9)                                    # no ninth label: typed as text
    assert w.group_page.label.text() == "9" and w.group_page.label.hasFocus()


def test_redo_and_keep_only_these_through_keys(qtbot, w):
    grid = w.group_page.grid
    g = w.current()
    members = list(g.members)
    grid.setFocus()
    # Take the first photo out with Space, then Ctrl+K: only it is kept.
    grid.setCurrentIndex(w.group_model.index(0))
    key(qtbot, grid, Qt.Key.Key_Space)
    assert w.group_model.taken_out() == members[:1]
    key(qtbot, grid, Qt.Key.Key_K, C)
    assert w.group_model.taken_out() == members[1:]
    key(qtbot, grid, Qt.Key.Key_K, C)                                  # swaps back
    assert w.group_model.taken_out() == members[:1]
    key(qtbot, grid, Qt.Key.Key_K, C)
    # Accept the kept photo, undo, redo.
    w.group_page.label.setText("kept one")
    w.group_page.confirm_unseen = lambda: True                          # every member is on screen anyway
    key(qtbot, grid, Qt.Key.Key_Return)
    assert w.project.photo_info(members[0])["label"] == "kept one"
    assert all(w.project.photo_info(m)["label"] != "kept one" for m in members[1:])
    key(qtbot, grid, Qt.Key.Key_Z, C)
    assert w.project.photo_info(members[0])["state"] == "unlabelled"
    key(qtbot, w.group_page.grid, Qt.Key.Key_Z, CS)
    assert w.project.photo_info(members[0])["label"] == "kept one"
    last = w.project.store.decisions()[-1]
    assert last["kind"] == "accept" and last["undoes"] is not None
    key(qtbot, w.group_page.grid, Qt.Key.Key_Z, CS)                     # nothing more to redo: said, not done
    assert "nothing to redo" in w.group_page.message.text()
    assert w.project.store.decisions()[-1]["id"] == last["id"]


def test_preview_zoom_pan_steps_take_out_and_labelled_neighbours(qtbot, w):
    grid = w.group_page.grid
    members = list(w.current().members)
    grid.setFocus()
    grid.setCurrentIndex(w.group_model.index(0))
    key(qtbot, grid, Qt.Key.Key_P, C)
    dlg = w.last_preview
    view = dlg.picture
    assert dlg.isVisible() and dlg.path == members[0]
    qtbot.waitUntil(lambda: bool(dlg.near_model.paths) and view.photo_size is not None, timeout=20_000)
    # Neighbours, each with its label: the same as the engine's answer, with the states read back.
    near = w.project.neighbours(members[0], 8)
    assert dlg.near_model.paths == [q for q, _ in near]
    for q, note in zip(dlg.near_model.paths, dlg.near_model.notes):
        st = w.project.photo_info(q)
        want = {"labelled": f"“{st['label']}”", "set_aside": "set aside", "unlabelled": "no label"}[st["state"]]
        assert note.split(" · ", 1)[1] == want
    # Z: 100 % (one photo pixel per screen pixel), Z again: fit.
    fit = view.shown_zoom()
    qtbot.keyClick(view, Qt.Key.Key_Z)
    assert view.zoom == 1.0 and "shown at 100 %" in dlg.info.text()
    qtbot.keyClick(view, Qt.Key.Key_Z)
    assert view.zoom is None and view.shown_zoom() == pytest.approx(fit)
    # +: zoom in until the photo is larger than the view, then pan with the arrows and by dragging.
    for _ in range(12):
        qtbot.keyClick(view, Qt.Key.Key_Plus)
    assert view.target().width() > view.width() and view.target().height() > view.height()
    before = view.target().center()
    qtbot.keyClick(view, Qt.Key.Key_Right)                              # look further right: photo moves left
    assert view.target().center().x() == pytest.approx(before.x() - 80)
    qtbot.keyClick(view, Qt.Key.Key_Down)
    assert view.target().center().y() == pytest.approx(before.y() - 80)
    start = view.rect().center()
    qtbot.mousePress(view, Qt.MouseButton.LeftButton, pos=start)
    from PySide6.QtCore import QPoint
    from PySide6.QtGui import QMouseEvent
    from PySide6.QtCore import QEvent, QPointF
    moved = QMouseEvent(QEvent.Type.MouseMove, QPointF(start + QPoint(30, 20)), QPointF(start + QPoint(30, 20)),
                        Qt.MouseButton.NoButton, Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier)
    qtbot.wait(5)
    from PySide6.QtWidgets import QApplication
    QApplication.sendEvent(view, moved)
    qtbot.mouseRelease(view, Qt.MouseButton.LeftButton, pos=start + QPoint(30, 20))
    assert view.target().center().x() == pytest.approx(before.x() - 80 + 30)
    qtbot.keyClick(view, Qt.Key.Key_Minus)
    assert view.shown_zoom() < 8.0
    # PgDn / PgUp: the next / previous photo of the group.
    qtbot.keyClick(view, Qt.Key.Key_PageDown)
    assert dlg.path == members[1] and view.zoom is None
    # Space inside the preview takes the shown photo out of the group (and puts it back).
    qtbot.keyClick(view, Qt.Key.Key_Space)
    assert w.group_model.taken_out() == [members[1]]
    assert "taken out" in dlg.note.text()
    qtbot.keyClick(view, Qt.Key.Key_PageUp)
    assert dlg.path == members[0]
    qtbot.keyClick(view, Qt.Key.Key_PageUp)                             # first photo: stays
    assert dlg.path == members[0] and "first photo" in dlg.note.text()
    qtbot.keyClick(view, Qt.Key.Key_PageDown)
    qtbot.keyClick(view, Qt.Key.Key_Space)
    assert w.group_model.taken_out() == []
    dlg.close()
