"""The backdrop correction's window switch (app/backdrop_menu.py), chosen with mouse clicks on the real
Folder menu (offscreen): it runs as a job on the group page's progress bar, Cancel stops it with
nothing changed, a finished run says its outcome in one line (with the labels' "helps / hurts" check
once 50 photos carry labels) and forms the groups again; "Backdrop correction off" switches it off.
What the store recorded is read back through the engine (`backdrop_correction.assignment`)."""
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")  # before any Qt import

import re

from PySide6.QtCore import Qt
from PySide6.QtTest import QTest

from core import backdrop_correction
from core.project import Project
from tests.test_window_session import make_window, open_and_wait, settle


def choose(qtbot, w, text):
    """Open the Folder menu and click the entry `text` with the mouse."""
    folder = next(a.menu() for a in w.menuBar().actions() if a.menu() and a.text() == "&Folder")
    action = next(a for a in folder.actions() if a.text() == text)
    folder.popup(w.mapToGlobal(w.rect().topLeft()))
    qtbot.waitUntil(folder.isVisible, timeout=5_000)
    QTest.mouseClick(folder, Qt.MouseButton.LeftButton, pos=folder.actionGeometry(action).center())


def ended(qtbot, w):
    qtbot.waitUntil(lambda: w.job is None and w.pending is None and w.idle(), timeout=300_000)
    settle(qtbot, w)


def test_backdrop_menu_cancel_run_check_and_off(qtbot, tmp_path, demo_folder):
    with Project.open(demo_folder, annotator="tester") as p:      # 50+ labelled photos, 2+ labels
        k = 0
        while p.status().labelled < 50:
            p.accept(p.propose(limit=1, hold=1)[0].id, f"kind {k}")
            k += 1
    w = make_window(qtbot, tmp_path)
    open_and_wait(qtbot, w, demo_folder)
    entries = [a.text() for a in next(a.menu() for a in w.menuBar().actions() if a.text() == "&Folder").actions()]
    assert "Correct for backdrops…" in entries and "Backdrop correction off" in entries

    # Started, then Cancel clicked on the progress bar at once: nothing changed.
    choose(qtbot, w, "Correct for backdrops…")
    qtbot.waitUntil(lambda: w.job is not None, timeout=10_000)
    assert w.group_page.busy.isVisible() and w.group_page.busy.unit == "photos"
    QTest.mouseClick(w.group_page.busy.cancel_button, Qt.MouseButton.LeftButton)
    ended(qtbot, w)
    assert w.last_backdrop == "Backdrop correction stopped: nothing changed."
    assert backdrop_correction.assignment(w.project) is None

    # Run to the end: the one-line outcome, the labels' check, the groups formed again.
    before = [g.id for g in w.groups]
    choose(qtbot, w, "Correct for backdrops…")
    ended(qtbot, w)
    line = w.last_backdrop
    photos = w.project.status().photos
    m = re.match(r"Backdrop correction on: (\d+) photos in 4 backdrop groups \(([\d, ]+)\)", line)
    assert m and int(m.group(1)) == photos and sum(map(int, m.group(2).split(", "))) == photos
    assert re.search(r"Your \d+ labelled photos: .* (it helps|it hurts|no clear difference)", line)
    assert line in w.group_page.message.text()
    assign = backdrop_correction.assignment(w.project)
    assert assign is not None and sorted(set(assign.tolist())) == [0, 1, 2, 3]
    assert w.groups and min(g.id for g in w.groups) > max(before)    # formed again in the corrected space

    # Switched off from the same menu.
    choose(qtbot, w, "Backdrop correction off")
    ended(qtbot, w)
    assert backdrop_correction.assignment(w.project) is None
    assert w.last_backdrop.startswith("Backdrop correction off")
    choose(qtbot, w, "Backdrop correction off")
    ended(qtbot, w)
    assert w.last_backdrop == "The backdrop correction is not on."
    w.close_folder()
