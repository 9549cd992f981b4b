"""What is accepted is what was seen: the group grid at every group size and window size, checked against
Qt's own layout of the cards (QListView.visualRect / indexAt, the scrollbar Qt shows), never against the
sizing formula; keys delivered to the focused widget, clicks to the viewport at a card's drawn centre."""
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")  # before any Qt import

import shutil
from pathlib import Path

import pytest
from PySide6.QtCore import QEvent, QPointF, QSettings, Qt
from PySide6.QtGui import QMouseEvent
from PySide6.QtTest import QTest
from PySide6.QtWidgets import QApplication

from app.main_window import MainWindow
from app.photo_grid import MAX_SIDE, MIN_SIDE

ROOT = Path(__file__).resolve().parent.parent
WINDOW_SIZES = [(1024, 700), (1152, 768), (1280, 800), (1366, 768), (1440, 900), (1600, 900), (1920, 1080)]
LEFT, NONE = Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier


@pytest.fixture(scope="module")
def photos(tmp_path_factory):
    """96 distinct photo files (the demo folder's, regenerated with its generator when absent)."""
    folder = ROOT / "sample_images"
    if not (folder.is_dir() and len(list(folder.rglob("*.jpg"))) >= 96):
        from app.demo import generate_demo

        folder = tmp_path_factory.mktemp("demo") / "photos"
        generate_demo(folder, folder.parent / "truth.csv", seed=7)
    paths = sorted(p.relative_to(folder).as_posix() for p in folder.rglob("*.jpg"))[:96]
    assert len(paths) == 96
    return folder, paths


@pytest.fixture
def bare(qtbot, tmp_path, photos):
    """The window on its group page with photos but no folder open: layout only, no engine."""
    folder, paths = photos
    w = MainWindow(QSettings(str(tmp_path / "settings.ini"), QSettings.Format.IniFormat))
    qtbot.addWidget(w)
    w.thumbs.set_folder(folder)
    w.stack.setCurrentWidget(w.work)
    w.show()
    w.activateWindow()
    qtbot.waitExposed(w)
    return w, paths


def focused_key(k):
    """A key as a window system delivers it: to whichever widget has the focus."""
    QTest.keyClick(QApplication.focusWidget(), k)


def rects(grid, n):
    return [grid.visualRect(grid.model().index(r)) for r in range(n)]


def drawn_order(grid, n):
    """Cards in reading order of where Qt drew them: rows top to bottom, left to right in a row."""
    return sorted(range(n), key=lambda r: (grid.visualRect(grid.model().index(r)).y(),
                                           grid.visualRect(grid.model().index(r)).x()))


def test_every_member_is_reachable_at_every_size(qtbot, bare):
    """Group sizes 1-96 at window sizes 1024x700 to 1920x1080: every card either lies whole inside
    the viewport (and then no scrollbar is shown), or the grid shows a scrollbar whose range reaches
    the last card; cards are never below the readable size; the size is the largest that fits."""
    w, paths = bare
    grid, model = w.group_page.grid, w.group_model
    sb = grid.verticalScrollBar()
    scrolled = 0
    for size in WINDOW_SIZES:
        w.resize(*size)
        qtbot.wait(20)
        for n in range(1, 97):
            model.set_photos(paths[:n])
            QApplication.processEvents()
            vp = grid.viewport().rect()
            cards = rects(grid, n)
            where = f"{n} photos at {size[0]}x{size[1]} (side {model.side})"
            assert model.side >= MIN_SIDE, where
            # The sizing rule agrees with Qt's layout (else refit's check against it stepped down), so
            # the size the next group's thumbnails are decoded at in advance is the size shown.
            assert model.side == grid.side_for(n), where
            assert all(0 <= r.left() and r.right() < vp.width() for r in cards), where  # no column cut off
            if all(vp.contains(r) for r in cards):
                assert not sb.isVisible(), where                       # no scrollbar with nothing to scroll
                if model.side < MAX_SIDE:  # one size step larger, Qt's layout would need scrolling
                    model.set_side(model.side + 8)
                    grid.doItemsLayout()
                    assert (not all(vp.contains(r) for r in rects(grid, n))
                            or grid.contentsSize().height() > grid.maximumViewportSize().height()), where
                    grid.refit()
            else:
                scrolled += 1
                assert model.side == MIN_SIDE, where                   # shrink first, scroll last
                assert sb.isVisible() and sb.maximum() > 0, where      # never a cut-off row without a scrollbar
                assert max(r.bottom() for r in cards) < vp.height() + sb.maximum(), where
                assert all(r.height() <= vp.height() for r in cards), where
    assert scrolled > 0  # the large groups at the small sizes did scroll


@pytest.mark.parametrize("size", [(1024, 700), (1366, 768), (1920, 1080)])
def test_keys_follow_the_drawn_layout(qtbot, bare, size):
    """From the first card, Right walks every member in the order Qt drew them; Down lands on the card
    drawn straight below; End reaches the last card and scrolls it whole into view; Home goes back;
    PageDown moves down the drawn rows."""
    w, paths = bare
    grid, model = w.group_page.grid, w.group_model
    w.resize(*size)
    for n in range(1, 97):
        model.set_photos(paths[:n])
        QApplication.processEvents()
        grid.setFocus()
        assert QApplication.focusWidget() is grid
        where = f"{n} photos at {size[0]}x{size[1]}"
        order = drawn_order(grid, n)
        grid.setCurrentIndex(model.index(0))
        walk = [0]
        for _ in range(n - 1):
            focused_key(Qt.Key.Key_Right)
            walk.append(grid.currentIndex().row())
        assert walk == order, where

        grid.setCurrentIndex(model.index(0))
        grid.scrollToTop()
        at = 0
        while True:
            focused_key(Qt.Key.Key_Down)
            now = grid.currentIndex().row()
            below = [r for r in range(n) if grid.visualRect(model.index(r)).x() == grid.visualRect(model.index(at)).x()
                     and grid.visualRect(model.index(r)).y() > grid.visualRect(model.index(at)).y()]
            if not below:
                assert now == at, where
                break
            nearest = min(below, key=lambda r: grid.visualRect(model.index(r)).y())
            assert now == nearest, where
            assert grid.viewport().rect().contains(grid.visualRect(model.index(now))), where  # scrolled into view
            at = now

        focused_key(Qt.Key.Key_End)
        assert grid.currentIndex().row() == order[-1], where
        assert grid.viewport().rect().contains(grid.visualRect(model.index(order[-1]))), where
        focused_key(Qt.Key.Key_Home)
        assert grid.currentIndex().row() == 0, where
        y0 = grid.visualRect(model.index(0)).y()
        focused_key(Qt.Key.Key_PageDown)
        row = grid.currentIndex().row()
        assert grid.visualRect(model.index(row)).y() >= y0, where
        assert grid.viewport().rect().contains(grid.visualRect(model.index(row))), where


# -- with a folder open: the engine checks what an accept labelled ---------------------------------

def _open(qtbot, tmp_path, scanned_demo, size):
    folder = tmp_path / "photos"
    shutil.copytree(scanned_demo, folder, symlinks=True)
    w = MainWindow(QSettings(str(tmp_path / "settings.ini"), QSettings.Format.IniFormat))
    qtbot.addWidget(w)
    w.resize(*size)
    w.show()
    w.activateWindow()
    qtbot.waitExposed(w)
    with qtbot.waitSignal(w.groups_shown, timeout=180_000):
        assert w.open_folder(str(folder))
    return w


def _all_seen(qtbot, grid):
    """Look at the whole group as a mouse user does: drag the scrollbar down a page at a time."""
    bar = grid.verticalScrollBar()
    for value in range(0, bar.maximum() + bar.pageStep(), max(bar.pageStep(), 1)):
        bar.setValue(value)
        qtbot.wait(50)
    qtbot.waitUntil(lambda: not grid.unseen_paths(), timeout=20_000)


def click(grid, row):
    QTest.mouseClick(grid.viewport(), LEFT, NONE, grid.visualRect(grid.model().index(row)).center())


def double_click(grid, row):
    """A double-click as the X server delivers it to Qt (seen with xdotool under Xvfb): press,
    release, then a double-click event in place of the second press, then its release."""
    at = grid.visualRect(grid.model().index(row)).center()
    QTest.mouseClick(grid.viewport(), LEFT, NONE, at)
    ev = QMouseEvent(QEvent.Type.MouseButtonDblClick, QPointF(at), QPointF(grid.viewport().mapToGlobal(at)),
                     LEFT, LEFT, NONE)
    QApplication.sendEvent(grid.viewport(), ev)
    QTest.mouseRelease(grid.viewport(), LEFT, NONE, at)


def test_click_takes_out_and_the_header_counts_what_accept_labels(qtbot, tmp_path, scanned_demo):
    w = _open(qtbot, tmp_path, scanned_demo, (1280, 800))
    page, grid, model, p = w.group_page, w.group_page.grid, w.group_model, w.project
    g = w.current()
    n = len(g.members)
    assert n >= 4
    assert f"Accept will label all {n} photos" in page.header.text()
    assert "Click to take it out" in model.index(0).data(Qt.ItemDataRole.ToolTipRole)
    assert "/" in model.index(0).data(Qt.ItemDataRole.DisplayRole) or "/" not in g.members[0]  # subfolder shown

    click(grid, 1)
    click(grid, 3)
    assert model.taken_out() == [g.members[1], g.members[3]]
    assert f"Accept will label {n - 2} of {n} photos (2 taken out)" in page.header.text()
    click(grid, 3)  # put back
    assert model.taken_out() == [g.members[1]]
    assert f"Accept will label {n - 1} of {n} photos (1 taken out)" in page.header.text()

    double_click(grid, 2)  # a double-click previews and takes nothing out
    assert model.taken_out() == [g.members[1]]
    assert w.last_preview.isVisible() and w.last_preview.path == g.members[2]
    w.last_preview.close()
    w.activateWindow()
    qtbot.waitUntil(lambda: QApplication.activeWindow() is w)

    _all_seen(qtbot, grid)
    page.label.setText("bolt")
    grid.setFocus()
    before = p.status().labelled
    focused_key(Qt.Key.Key_Return)
    qtbot.waitUntil(w.idle, timeout=20_000)                 # the accept runs on the engine thread
    # Outside the window: the engine's own count of labelled photos grew by the header's figure.
    assert p.status().labelled - before == n - 1
    assert p.photo_info(g.members[1])["state"] == "unlabelled"


def test_accept_asks_before_labelling_photos_never_on_screen(qtbot, tmp_path, scanned_demo):
    w = _open(qtbot, tmp_path, scanned_demo, (1024, 700))
    page, grid, model, p = w.group_page, w.group_page.grid, w.group_model, w.project
    g = w.current()
    def outside():
        return [m for r, m in enumerate(g.members) if not grid.viewport().rect().contains(grid.visualRect(model.index(r)))]

    # Once the window has settled and the thumbnails have arrived, the unseen ones are exactly the
    # cards Qt has not placed whole inside the viewport.
    qtbot.waitUntil(lambda: grid.unseen_paths() == outside(), timeout=20_000)
    unseen = grid.unseen_paths()
    if not unseen:
        pytest.skip("the demo's first group fits the smallest window whole")

    page.label.setText("spring")
    grid.setFocus()
    decisions = len(p.store.decisions())
    focused_key(Qt.Key.Key_Return)
    assert len(p.store.decisions()) == decisions          # nothing labelled yet: asked first
    assert page.question.isVisible() and f"{len(unseen)} photo" in page.question_text.text()

    focused_key(Qt.Key.Key_Escape)                          # Esc goes back to the first unseen photo
    assert not page.question.isVisible()
    first = g.members.index(unseen[0])
    assert grid.currentIndex().row() == first
    qtbot.waitUntil(lambda: grid.viewport().rect().contains(grid.visualRect(model.index(first))), timeout=5_000)

    focused_key(Qt.Key.Key_Return)                          # still some unseen: asked again, once
    left = grid.unseen_paths()
    if left:
        assert page.question.isVisible()
        focused_key(Qt.Key.Key_Return)                      # Return confirms
    qtbot.waitUntil(w.idle, timeout=20_000)                 # the accept runs on the engine thread
    assert len(p.store.decisions()) == decisions + 1
    last = p.store.decisions()[-1]
    assert last["kind"] == "accept" and sorted(last["photos"]) == sorted(g.members)


def test_accept_does_not_ask_when_everything_was_seen(qtbot, tmp_path, scanned_demo):
    w = _open(qtbot, tmp_path, scanned_demo, (1920, 1080))
    page, grid, p = w.group_page, w.group_page.grid, w.project
    g = w.current()
    _all_seen(qtbot, grid)
    page.label.setText("washer")
    grid.setFocus()
    focused_key(Qt.Key.Key_Return)
    assert not page.question.isVisible()
    qtbot.waitUntil(w.idle, timeout=20_000)                 # the accept runs on the engine thread
    assert p.store.decisions()[-1]["kind"] == "accept" and sorted(p.store.decisions()[-1]["photos"]) == sorted(g.members)


def test_captions_keep_the_file_name_and_show_the_subfolder_when_there_is_room(qtbot, bare):
    """The caption is the path relative to the folder: the subfolders are shortened (in the middle)
    before the file name is, and nothing is drawn wider than the card."""
    from PySide6.QtGui import QFontMetrics

    from app.photo_grid import elide_path

    w, _ = bare
    fm = QFontMetrics(w.group_page.grid.font())
    path = "drawer-b/lower-tray/IMG_0525.jpg"
    assert elide_path(fm, path, fm.horizontalAdvance(path)) == path
    for width in range(fm.horizontalAdvance("IMG_0525.jpg"), fm.horizontalAdvance(path)):
        text = elide_path(fm, path, width)
        assert fm.horizontalAdvance(text) <= width and text.endswith("/IMG_0525.jpg") or text == "IMG_0525.jpg"
    wide = elide_path(fm, path, fm.horizontalAdvance(path) - 10)
    assert wide.startswith("dr") and wide.endswith("/IMG_0525.jpg") and "…" in wide


# -- the mouse under a real X server ----------------------------------------------------------------

@pytest.mark.skipif(not (shutil.which("xvfb-run") and shutil.which("xdotool")),
                    reason="needs xvfb-run and xdotool (apt-get install xvfb xdotool)")
def test_mouse_in_a_real_window(tmp_path, scanned_demo):
    """Clicks from xdotool through Xvfb and Qt's xcb platform, as a user's mouse arrives: a click takes
    a photo out, a double-click previews and takes nothing out, Accept on a group that does not fit
    asks first, Esc shows the first unseen photo, and "Accept anyway" labels exactly the members not
    taken out (checked in the store)."""
    import json
    import subprocess
    import sys

    folder = tmp_path / "photos"
    shutil.copytree(scanned_demo, folder, symlinks=True)
    env = dict(os.environ, QT_QPA_PLATFORM="xcb", HOME=str(tmp_path),
               PYTHONPATH=os.pathsep.join([str(ROOT)] + [p for p in [os.environ.get("PYTHONPATH")] if p]))
    proc = subprocess.run(["xvfb-run", "-a", "-s", "-screen 0 1600x1000x24", sys.executable, __file__, str(folder),
                           str(tmp_path / "settings.ini")], capture_output=True, text=True, env=env, timeout=600,
                          cwd=str(ROOT))
    rows = [json.loads(line) for line in proc.stdout.splitlines() if line.startswith("{")]
    assert rows, proc.stdout[-2000:] + proc.stderr[-3000:]
    r = rows[-1]
    if r.get("skip"):
        pytest.skip(r["skip"])
    n = len(r["members"])
    assert r["after_click"] == [r["members"][2]] and f"{n - 1} of {n} photos" in r["header"]
    assert r["after_double_click"] == [r["members"][2]] and r["preview_of"] == r["members"][3]
    assert r["asked"] and r["decisions_after_ask"] == 0 and f"{r['unseen']} photo" in r["question"]
    assert r["after_esc_current"] == r["first_unseen_row"] and r["after_esc_visible"]
    # Outside the window: the store holds one accept of exactly the members not taken out.
    from core.project import Project

    with Project.open(folder) as p:
        accepts = [d for d in p.store.decisions() if d["kind"] == "accept"]
    assert len(accepts) == 1 and accepts[0]["label"] == "fuse"
    assert sorted(accepts[0]["photos"]) == sorted(m for m in r["members"] if m != r["members"][2])


def _mouse_session(folder: str, settings: str) -> None:
    """The child side of test_mouse_in_a_real_window: the window on the X server, xdotool's clicks."""
    import json
    import subprocess
    import time

    from PySide6.QtWidgets import QToolButton

    app = QApplication([])
    w = MainWindow(QSettings(settings, QSettings.Format.IniFormat))

    def settle(seconds):
        end = time.monotonic() + seconds
        while time.monotonic() < end:
            app.processEvents()
            time.sleep(0.01)

    def xdo(*args, wait=0.4):
        subprocess.run(["xdotool", *map(str, args)], check=True)
        settle(wait)

    def click(widget, at=None, repeat=1):
        c = widget.mapToGlobal(at if at is not None else widget.rect().center())
        xdo("mousemove", c.x(), c.y())
        xdo("click", "--repeat", repeat, "--delay", 80, 1, wait=0.8)  # past the double-click time

    w.resize(1024, 700)
    w.move(0, 0)
    w.show()
    w.open_folder(folder)
    end = time.monotonic() + 300
    while not w.groups and time.monotonic() < end:
        settle(0.1)
    settle(2.0)
    g, page, grid, model, p = w.current(), w.group_page, w.group_page.grid, w.group_model, w.project
    out = dict(members=g.members)
    if len(g.members) < 5 or not grid.unseen_paths():
        print(json.dumps(dict(skip="the first group fits a 1024x700 window whole")))
        return
    click(grid.viewport(), grid.visualRect(model.index(2)).center())
    out.update(after_click=model.taken_out(), header=page.header.text())
    click(grid.viewport(), grid.visualRect(model.index(3)).center(), repeat=2)
    out.update(after_double_click=model.taken_out(), preview_of=getattr(w, "last_preview", None) and w.last_preview.path)
    w.last_preview.close()
    settle(0.5)
    click(page.label)
    xdo("type", "--delay", 40, "fuse")
    accept = next(b for b in page.findChildren(QToolButton) if b.defaultAction() is w.actions["accept"])
    unseen = grid.unseen_paths()
    before = len(p.store.decisions())
    click(accept)
    out.update(asked=page.question.isVisible(), question=page.question_text.text(), unseen=len(unseen),
               decisions_after_ask=len(p.store.decisions()) - before, first_unseen_row=g.members.index(unseen[0]))
    click(page.label)  # the pointer over the window, so the key goes to it
    xdo("key", "Escape", wait=0.8)
    row = grid.currentIndex().row()
    out.update(after_esc_current=row,
               after_esc_visible=grid.viewport().rect().contains(grid.visualRect(model.index(row))))
    click(accept)
    if page.question.isVisible():
        click(page.accept_anyway)
    print(json.dumps(out), flush=True)
    w.close()


if __name__ == "__main__":
    import sys

    _mouse_session(sys.argv[1], sys.argv[2])
