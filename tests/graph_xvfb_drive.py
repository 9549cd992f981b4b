"""Drive the window's graph build with real key presses (xdotool) under an X server; run by
tests/test_graph_progress_window.py inside xvfb-run:

    xvfb-run -a python3 -m tests.graph_xvfb_drive FOLDER SETTINGS

Opens FOLDER (its graph not cached); the build is paced as in that test (blocks of 64 photos, 40 ms
each). Steps: Esc while the scan page shows "Finding neighbours", Ctrl+R (review needs the graph: it is
built first), Esc on the group page, Ctrl+R again to the end. Prints one line per step,
`<step> <ok> <facts>`; exits 0 when every step ran."""
from __future__ import annotations

import subprocess
import sys
import time

from PySide6.QtCore import QSettings, QTimer
from PySide6.QtWidgets import QApplication

from app.main_window import MainWindow
from core import neighbours


def main(argv: list[str]) -> int:
    folder, settings = argv[0], argv[1]
    neighbours._BLOCK = 64
    real = neighbours._run_blocks
    neighbours._run_blocks = lambda block, *a, **kw: real(lambda i: (time.sleep(0.04), block(i))[1], *a, **kw)
    app = QApplication([])
    w = MainWindow(QSettings(settings, QSettings.Format.IniFormat))
    w.resize(1280, 800)
    w.show()

    def wait(cond, seconds: float) -> bool:
        end = time.monotonic() + seconds
        while not cond() and time.monotonic() < end:
            app.processEvents()
            time.sleep(0.005)
        return bool(cond())

    def key(name: str) -> None:
        subprocess.run(["xdotool", "key", name], check=True)

    def say(step: str, ok: bool, *facts) -> None:
        print(step, ok, *facts, flush=True)

    def run() -> None:
        wid = subprocess.run(["xdotool", "search", "--onlyvisible", "--name", "^Kinfold"], capture_output=True,
                             text=True).stdout.split()
        subprocess.run(["xdotool", "windowfocus", "--sync", wid[-1]], check=True)
        w.open_folder(folder)
        say("shown", wait(lambda: w.scan_page.progress.text.text().startswith("Finding neighbours"), 120))
        key("Escape")
        say("stopped", wait(lambda: w.job is None, 30), w.group_page.header.text() == "No groups yet",
            w.find_groups.isVisible(), not w.project.graph_ready())
        key("ctrl+r")
        say("building", wait(lambda: w.group_page.busy.text.text().startswith("Finding neighbours"), 60))
        key("Escape")
        say("stopped-again", wait(lambda: w.job is None, 30), not w.project.graph_ready(), w.find_groups.isVisible())
        key("ctrl+r")
        say("review", wait(lambda: w.stack.currentWidget() is w.review_page and w.idle(), 120),
            w.project.graph_ready(), not w.find_groups.isVisible())
        w.close()
        app.quit()

    failed = []

    def guarded() -> None:
        try:
            run()
        except Exception as exc:             # a step that could not run: say so and end, never hang
            failed.append(exc)
            print(f"failed {exc!r}", file=sys.stderr, flush=True)
            w.close()
            app.quit()

    QTimer.singleShot(1000, guarded)
    app.exec()
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
