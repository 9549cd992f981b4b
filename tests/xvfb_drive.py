"""Drive the real window with xdotool under an X server (run by tests/test_window_session.py inside
xvfb-run): real key presses and mouse clicks, as a person makes them.

    xvfb-run -a python3 -m tests.xvfb_drive FOLDER SETTINGS STEP...

STEP is `type:TEXT`, `key:KEYSYM` (xdotool names: Return, KP_Enter, Down) or `click:accept` (the
Accept button). After each step the window is given a second to settle. Prints one line per step:
`step <n> <focus widget class> <popup open>`; exits 0 when every step ran.
"""
from __future__ import annotations

import subprocess
import sys
import time

from PySide6.QtCore import QSettings, QTimer
from PySide6.QtWidgets import QApplication, QToolButton

from app.main_window import MainWindow


def main(argv: list[str]) -> int:
    folder, settings, steps = argv[0], argv[1], argv[2:]
    app = QApplication([])
    w = MainWindow(QSettings(settings, QSettings.Format.IniFormat))
    w.show()

    def settle(seconds: float) -> None:
        end = time.monotonic() + seconds
        while time.monotonic() < end or not w.idle():
            app.processEvents()
            time.sleep(0.005)

    def run() -> None:
        wid = subprocess.run(["xdotool", "search", "--name", "^Kinfold"], capture_output=True,
                             text=True).stdout.split()
        subprocess.run(["xdotool", "windowfocus", "--sync", wid[-1]], check=True)
        settle(0.5)
        for n, step in enumerate(steps, 1):
            kind, arg = step.split(":", 1)
            if kind == "type":
                subprocess.run(["xdotool", "type", "--delay", "40", arg], check=True)
            elif kind == "key":
                subprocess.run(["xdotool", "key", arg], check=True)
            else:
                button = next(b for b in w.group_page.findChildren(QToolButton)
                              if b.defaultAction() is w.actions[arg])
                at = button.mapToGlobal(button.rect().center())
                subprocess.run(["xdotool", "mousemove", "--sync", str(at.x()), str(at.y()), "click", "1"],
                               check=True)
            settle(1.0)
            focus = QApplication.focusWidget()
            print(f"step {n} {type(focus).__name__ if focus else None} {w.group_page.label.popup_open()}",
                  flush=True)
        w.close()
        app.quit()

    started = []

    def first_group() -> None:
        if not started:
            started.append(True)
            QTimer.singleShot(300, run)

    w.groups_shown.connect(first_group)
    w.open_folder(folder)
    app.exec()
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
