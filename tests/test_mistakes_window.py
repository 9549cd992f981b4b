"""The window's likely-mistakes page, driven by key events delivered to the focused widget (or the open
popup) as a window system delivers them; each decision checked on a second Store reading the same file.

Outside reference: the conftest folder's photos are five variants of each of six scikit-image sample
photos, so a photo's file name is its true class."""
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")  # before any Qt import

from pathlib import Path

from PySide6.QtCore import Qt

from core.project import Project
from tests.test_window_session import (CTRL, focus, make_window, open_and_wait, press, reader, settle, target,
                                       type_text)

PLANTED = {"b/coffee_2.jpg": "chelsea", "a/astronaut_1.jpg": "rocket", "b/coins_3.jpg": "camera"}


def _labelled_with_errors(folder):
    with Project.open(folder, annotator="tester") as p:
        truth = {q: Path(q).name.rsplit("_", 1)[0] for q in p.photos()}
        for c in sorted(set(truth.values())):
            p.label([q for q, t in truth.items() if t == c], c)
        for q, wrong in PLANTED.items():
            p.label([q], wrong)
        return truth


def test_mistakes_page_by_keys(qtbot, tmp_path, photo_project_folder):
    folder = photo_project_folder
    truth = _labelled_with_errors(folder)
    w = make_window(qtbot, tmp_path)
    open_and_wait(qtbot, w, folder)
    page = w.mistakes_page
    assert any("Ctrl+M" in keys for _, rows in w.help.sections for keys, _ in rows)
    assert any(title == "Finding mistakes" for title, _ in w.help.sections)

    focus(w.group_page.grid)
    press(Qt.Key.Key_M, CTRL)
    qtbot.waitUntil(lambda: page.current() is not None and w.idle(), timeout=60_000)
    assert w.stack.currentWidget() is page
    assert {m.path for m in page.queue[:3]} == set(PLANTED)
    store, fp = reader(folder)
    actions = store.decision_count(actions_only=True)

    # Space skips: nothing is decided.
    first = page.current().path
    assert target() is page
    press(Qt.Key.Key_Space)
    assert page.current().path != first
    assert store.decision_count(actions_only=True) == actions

    # Return confirms the label as it is.
    second = page.current()
    press(Qt.Key.Key_Return)
    settle(qtbot, w)
    row = store.labels()[fp[second.path]]
    assert (row.label, row.how) == (second.label, "confirmed")
    assert store.decisions()[-1]["kind"] == "confirm"
    assert page.current().path not in (first, second.path)

    # Typing the right label and Return fixes the photo.
    third = page.current()
    right = truth[third.path]
    type_text(right)
    press(Qt.Key.Key_Return)
    settle(qtbot, w)
    row = store.labels()[fp[third.path]]
    assert (row.label, row.how) == (right, "confirmed")
    assert page.current() is None or page.current().path != third.path

    # Ctrl+Z takes the fix back; the queue is ranked again and holds the photo under its old label.
    focus(page)
    press(Qt.Key.Key_Z, CTRL)
    qtbot.waitUntil(lambda: w.idle() and page.current() is not None, timeout=60_000)
    assert store.labels()[fp[third.path]].label == third.label
    assert third.path in [m.path for m in page.queue]
    assert second.path not in [m.path for m in page.queue]   # still confirmed

    # Keys typed while a confirm is being recorded: a second Return decides nothing (it was pressed
    # before the next photo was on screen) and says so; Space waits and then skips the next photo.
    a, b, c = (m.path for m in page.queue[:3])
    confirms = sum(d["kind"] == "confirm" for d in store.decisions())
    press(Qt.Key.Key_Return)
    assert w.pending is not None
    press(Qt.Key.Key_Return)
    press(Qt.Key.Key_Space)
    settle(qtbot, w)
    assert page.current().path == c
    assert sum(d["kind"] == "confirm" for d in store.decisions()) == confirms + 1
    assert store.labels()[fp[a]].how == "confirmed" and store.labels()[fp[b]].how != "confirmed"
    assert "decided nothing" in page.message.text()

    # Esc goes back to the groups.
    focus(page)
    press(Qt.Key.Key_Escape)
    assert w.stack.currentWidget() is w.work
    store.close()
