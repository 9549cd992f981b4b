"""The statistics dialog (Ctrl+Shift+S), opened by a key event on the focused grid; its Export CSV…
button clicked with the mouse and the file read back with Python's csv module (RFC 4180)."""
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")  # before any Qt import

import csv

from PySide6.QtCore import Qt
from PySide6.QtTest import QTest
from PySide6.QtWidgets import QFileDialog

from core.project import Project
from tests.test_window_session import CTRL, focus, make_window, open_and_wait, press

SHIFT = Qt.KeyboardModifier.ShiftModifier


def test_statistics_dialog_by_keys_and_its_csv(qtbot, tmp_path, photo_project_folder, monkeypatch):
    folder = photo_project_folder
    for who, names in (("ana", ("chelsea", "coffee")), ("bob", ("rocket",))):
        with Project.open(folder, annotator=who) as p:
            for name in names:
                p.label([q for q in p.photos() if f"/{name}_" in q][:4 if name == "rocket" else 5], name)
    with Project.open(folder, lock=False) as p:
        expected = p.statistics()
    w = make_window(qtbot, tmp_path)
    open_and_wait(qtbot, w, folder)
    assert any("Ctrl+Shift+S" in keys for _, rows in w.help.sections for keys, _ in rows)

    focus(w.group_page.grid)
    press(Qt.Key.Key_S, CTRL | SHIFT)
    qtbot.waitUntil(lambda: getattr(w, "last_stats", None) is not None and w.last_stats.isVisible(), timeout=10_000)
    dlg = w.last_stats
    assert dlg.chart.bars == [("chelsea", 5), ("coffee", 5), ("rocket", 4)]
    assert dlg.summary.text() == f"{expected.photos} photos, 14 labelled under 3 labels"
    table = [[dlg.table.item(r, c).text() for c in range(dlg.table.columnCount())]
             for r in range(dlg.table.rowCount())]
    assert [row[:3] for row in table] == [["ana", "2", "10"], ["bob", "1", "4"], ["everyone", "3", "14"]]
    assert sum(n for _, n in dlg.hours.bars) == 14

    target = tmp_path / "stats.csv"
    monkeypatch.setattr(QFileDialog, "getSaveFileName", lambda *a, **k: (str(target), "CSV table (*.csv)"))
    QTest.mouseClick(dlg.export_button, Qt.MouseButton.LeftButton)
    assert dlg.written == target and str(target) in dlg.report.text()
    with open(target, newline="", encoding="utf-8") as f:
        rows = list(csv.reader(f))
    assert rows[0] == ["figure", "annotator", "key", "value"]
    assert ["photos", "", "rocket", "4"] in rows and ["labels given", "ana", "", "10"] in rows
    assert target.read_bytes().count(b"\r\n") == len(rows)

    QTest.keyClick(dlg, Qt.Key.Key_Escape)
    qtbot.waitUntil(lambda: not dlg.isVisible(), timeout=5_000)
