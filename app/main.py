"""`kinfold-app [FOLDER]` and `kinfold open [FOLDER]`: the desktop window."""
from __future__ import annotations

import argparse
import sys

from PySide6.QtCore import QTimer
from PySide6.QtWidgets import QApplication

from app.main_window import MainWindow


def main(argv=None) -> int:
    args = argparse.ArgumentParser(prog="kinfold-app", description="Open the Kinfold window.")
    args.add_argument("folder", nargs="?", help="photo folder to open (default: choose one)")
    ns = args.parse_args(sys.argv[1:] if argv is None else list(argv))
    app = QApplication.instance() or QApplication(sys.argv[:1])
    app.setOrganizationName("Kinfold")
    app.setApplicationName("Kinfold")
    win = MainWindow()
    win.show()
    if ns.folder:
        QTimer.singleShot(0, lambda: win.open_folder(ns.folder))
    return app.exec()


if __name__ == "__main__":
    raise SystemExit(main())
