"""Every view counts actions alike: accept, accept, Ctrl+Z, Ctrl+Shift+Z in the window (real key events,
offscreen) gives the same count in `status` (CLI, a subprocess), the statistics dialog (Ctrl+Shift+S)
and the window's chart. The rule (README "The window"): an undo is not an action; a redo is a new
decision of the undone kind and counts as one. So: 3."""
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")  # before any Qt import

import json
import subprocess
import sys

from PySide6.QtCore import Qt

from tests.test_browse_window import CS, C, idle, key
from tests.test_window_session import make_window, open_and_wait


def test_status_statistics_and_chart_agree_after_undo_and_redo(qtbot, tmp_path, demo_folder):
    w = make_window(qtbot, tmp_path)
    open_and_wait(qtbot, w, demo_folder)
    for name in ("first", "second"):
        grid = w.group_page.grid
        grid.setFocus()
        w.group_page.label.setText(name)
        w.group_page.confirm_unseen = lambda: True
        key(qtbot, grid, Qt.Key.Key_Return)
    key(qtbot, w.group_page.grid, Qt.Key.Key_Z, C)
    key(qtbot, w.group_page.grid, Qt.Key.Key_Z, CS)
    kinds = [(d["kind"], d["undoes"] is not None) for d in w.project.store.decisions()]
    assert kinds == [("accept", False), ("accept", False), ("undo", True), ("accept", True)]
    key(qtbot, w.group_page.grid, Qt.Key.Key_S, CS)
    qtbot.waitUntil(lambda: getattr(w, "last_stats", None) is not None and w.last_stats.isVisible(), timeout=10_000)
    dlg = w.last_stats
    table = {dlg.table.item(r, 0).text(): dlg.table.item(r, 1).text() for r in range(dlg.table.rowCount())}
    chart = w.curve.actions
    dlg.close()
    w.close_folder()
    out = subprocess.run([sys.executable, "-m", "app.cli", "status", str(demo_folder), "--json"],
                         capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    status = json.loads(out.stdout)["actions"]
    assert status == 3 and chart == 3
    assert set(table.values()) == {"3"}
