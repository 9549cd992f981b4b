"""Issue 18, the window: after a scan the neighbour graph is built as an engine job whose progress the
scan page shows in plain words ("Finding neighbours: 1,024 of 3,000 photos") with a working cancel (Esc
or the Cancel button); a cancel leaves the folder open and usable with no groups and a "Find groups"
button; an action that needs the graph (review) builds it first, shown in the group page's bar, where
Esc stops it too; closing the folder mid-build cancels and waits. Driven through key and mouse events
(pytest-qt, offscreen); the outcome is read from the engine (graph file, status), not from the window.

The folder holds 3,000 Fashion-MNIST test photos as PNG files (Debian package dataset-fashion-mnist),
their vectors written into the store beforehand (64 principal components of the pixels, as
benchmarks/review_scale.py does), so the window's scan embeds nothing. So that the build takes
visible time, the exact search is cut into blocks of 64 photos with a 40 ms pause in each (`slow_build`);
the build, its progress and its cancel are the product's."""
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")  # before any Qt import

import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from PySide6.QtCore import QSettings, Qt, QTimer
from PySide6.QtWidgets import QApplication

from app import jobs
from app.main_window import MainWindow
from core import neighbours
from core.project import Project

N = 3000


@pytest.fixture(scope="module")
def made(tmp_path_factory):
    from benchmarks.fashion import load_fashion_mnist, write_fashion_folder
    from benchmarks.window_stall import _extractor_id
    from core import catalogue

    folder = tmp_path_factory.mktemp("graph-window") / "photos"
    write_fashion_folder(folder, N)
    images, _ = load_fashion_mnist(N, "t10k")
    pixels = images.reshape(N, -1).astype(np.float32) / 255.0
    pixels -= pixels.mean(0)
    _, _, vt = np.linalg.svd(pixels[:2000], full_matrices=False)
    x = np.ascontiguousarray(pixels @ vt[:64].T, np.float32)
    with Project.open(folder, annotator="t") as p:
        cat = catalogue.scan_folder(folder, {}, {})
        row_of = {r.path: int(r.path.rsplit("_", 1)[1].split(".")[0]) for r in cat.photos}
        ext = _extractor_id()
        p.store.set_setting("extractor_id", ext)
        p.store.replace_catalogue(cat.photos, {})
        p.store.put_embeddings(ext, [r.fingerprint for r in cat.photos], x[[row_of[r.path] for r in cat.photos]])
    return folder


@pytest.fixture
def folder(made, tmp_path):
    dest = tmp_path / "photos"
    shutil.copytree(made, dest)
    return dest


@pytest.fixture
def slow_build(monkeypatch):
    monkeypatch.setattr(neighbours, "_BLOCK", 64)
    real = neighbours._run_blocks

    def slow(block, *a, **kw):
        def one(item):
            time.sleep(0.04)
            return block(item)
        return real(one, *a, **kw)

    monkeypatch.setattr(neighbours, "_run_blocks", slow)


@pytest.fixture
def window(qtbot, tmp_path):
    w = MainWindow(QSettings(str(tmp_path / "settings.ini"), QSettings.Format.IniFormat))
    qtbot.addWidget(w)
    w.show()
    w.activateWindow()
    qtbot.waitExposed(w)
    yield w
    w.close_folder()


def _graph_files(folder: Path) -> list[Path]:
    return list((folder / ".kinfold").glob("graph-*.npz"))


def _counts(text: str) -> tuple[int, int] | None:
    """(done, total) from "Finding neighbours: 1,024 of 3,000 photos  ·  …"."""
    if not text.startswith("Finding neighbours: "):
        return None
    done, _, rest = text[len("Finding neighbours: "):].partition(" of ")
    return int(done.replace(",", "")), int(rest.split()[0].replace(",", ""))


def test_build_shown_cancelled_then_found_again(qtbot, window, folder, slow_build):
    w = window
    page = w.scan_page.progress
    seen, gaps, last = [], [], [time.perf_counter()]

    def beat():
        now = time.perf_counter()
        gaps.append(now - last[0])
        last[0] = now
        seen.append((page.text.text(), page.bar.value(), page.bar.maximum()))

    timer = QTimer()
    timer.setInterval(10)
    timer.timeout.connect(beat)
    timer.start()
    assert w.open_folder(str(folder))
    # The scan ends, then the build shows its counts; once two steps have shown, Esc stops it.
    qtbot.waitUntil(lambda: sum(_counts(t) is not None for t, _, _ in seen) >= 2 and
                    len({_counts(t) for t, _, _ in seen if _counts(t)}) >= 2, timeout=120_000)
    assert w.job is not None and w.job.name == "finding groups" and page.cancel_button.isEnabled()
    qtbot.keyClick(w.scan_page, Qt.Key.Key_Escape)
    qtbot.waitUntil(lambda: w.job is None, timeout=30_000)
    timer.stop()
    shown = [(_counts(t), v, m) for t, v, m in seen if _counts(t)]
    assert all(total == N and m == N for (_, total), _, m in shown)       # the bar's range is the photo count
    assert any(0 < done < N for (done, _), _, _ in shown)
    assert max(gaps) < 1.0                                                 # the GUI thread was never held

    # Stopped: the folder is open, no graph kept, no groups, the button to go on; the engine agrees.
    assert w.stack.currentWidget() is w.work and w.project is not None
    assert not w.project.graph_ready() and not _graph_files(folder)
    assert w.current() is None and w.find_groups.isVisible()
    assert w.group_page.header.text() == "No groups yet"
    assert "stopped at" in w.group_page.empty.text() and "Every photo is labelled" not in w.group_page.empty.text()
    assert w.status.photos == N and w.project.status().photos == N
    assert QApplication.focusWidget() is w.find_groups     # Return or Space goes on from here

    # Usable meanwhile: a decision made outside the group page shows in the status, with no build.
    paths = w.project.photos()
    w.project.label(paths[:5], "shirt")
    w.project.label(paths[5:9], "shoe")
    w.refresh()
    qtbot.waitUntil(w.idle, timeout=30_000)
    assert w.status.labelled == 9 and not w.project.graph_ready() and w.find_groups.isVisible()

    # Find groups: the build again, in the group page's bar; Esc on the group page stops it too.
    qtbot.mouseClick(w.find_groups, Qt.MouseButton.LeftButton)
    busy = w.group_page.busy
    qtbot.waitUntil(lambda: busy.isVisible() and _counts(busy.text.text()) is not None, timeout=60_000)
    assert QApplication.focusWidget() is w.find_groups     # the keyboard is on the page, where Esc stops it
    qtbot.keyClick(QApplication.focusWidget(), Qt.Key.Key_Escape)
    qtbot.waitUntil(lambda: w.job is None, timeout=30_000)
    assert not w.project.graph_ready() and w.find_groups.isVisible() and not busy.isVisible()

    # Review needs the graph: Ctrl+R builds it first (progress in the group page), then opens the review.
    qtbot.keyClick(QApplication.focusWidget(), Qt.Key.Key_R, Qt.KeyboardModifier.ControlModifier)
    qtbot.waitUntil(lambda: _counts(busy.text.text()) is not None, timeout=60_000)
    qtbot.waitUntil(lambda: w.stack.currentWidget() is w.review_page and w.idle(), timeout=120_000)
    assert w.project.graph_ready() and len(_graph_files(folder)) == 1
    assert not w.find_groups.isVisible() and w.current() is not None       # groups are formed again
    qtbot.waitUntil(lambda: w.review_model.rowCount() > 0, timeout=30_000)


def test_closing_the_folder_mid_build_cancels_and_waits(qtbot, window, folder, slow_build):
    w = window
    page = w.scan_page.progress
    assert w.open_folder(str(folder))
    qtbot.waitUntil(lambda: _counts(page.text.text()) is not None, timeout=120_000)
    t0 = time.perf_counter()
    qtbot.keyClick(w.scan_page, Qt.Key.Key_W, Qt.KeyboardModifier.ControlModifier)
    seconds = time.perf_counter() - t0
    assert w.project is None and w.stack.currentWidget() is w.start
    assert not jobs.running()                          # nothing outlives the folder
    assert seconds < 10.0                              # stopped at its next block, not run to the end
    assert not _graph_files(folder)
    # The folder's lock is free: it opens again at once, and a build from there is whole.
    with Project.open(folder, annotator="t") as p:
        p.prepare_graph()
    assert len(_graph_files(folder)) == 1


@pytest.mark.skipif(not (shutil.which("xvfb-run") and shutil.which("xdotool")), reason="needs Xvfb and xdotool")
def test_real_keys_under_an_x_server(folder, tmp_path):
    """The same flow with real key presses (xdotool) in a real window: Esc reaches the build's cancel
    on the scan page and, with no groups on screen, on the group page too (the "Find groups" button
    holds the keyboard there)."""
    with Project.open(folder, annotator="t") as p:       # labels, so review has something to open
        paths = p.photos()
        p.label(paths[:5], "shirt")
        p.label(paths[5:9], "shoe")
    run = subprocess.run(["xvfb-run", "-a", "-s", "-screen 0 1400x900x24", sys.executable, "-m",
                          "tests.graph_xvfb_drive", str(folder), str(tmp_path / "settings.ini")],
                         cwd=Path(__file__).resolve().parent.parent, capture_output=True, text=True, timeout=600,
                         env=dict(os.environ, QT_QPA_PLATFORM="xcb",
                                  PYTHONPATH=str(Path(__file__).resolve().parent.parent)))
    assert run.returncode == 0, run.stderr[-2000:]
    assert "Traceback" not in run.stderr, run.stderr[-2000:]
    steps = {line.split()[0]: line.split()[1:] for line in run.stdout.splitlines() if line.strip()}
    assert list(steps) == ["shown", "stopped", "building", "stopped-again", "review"], run.stdout
    for step, facts in steps.items():
        assert facts and all(f == "True" for f in facts), (step, facts)
    assert len(_graph_files(folder)) == 1
