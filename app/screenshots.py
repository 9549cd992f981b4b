"""Render the main screens to PNG files, from a real session on a copy of the demo folder.

    python -m app.screenshots                      # -> resources/screenshots/*.png
    python -m app.screenshots --out DIR --folder PHOTOS

Runs without a screen (Qt's offscreen platform unless QT_QPA_PLATFORM says otherwise; xvfb-run works too).
The demo folder is copied to a temporary home folder and scanned there, so the originals are not
touched, and the window starts from empty settings there: no path of the machine that rendered the
pictures (recently opened folders, the status bar, the export report) appears in them.
"""
from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from collections import Counter
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
SIZE = (1280, 800)


def _wait(app, condition, seconds: float) -> bool:
    from PySide6.QtCore import QEventLoop

    end = time.monotonic() + seconds
    while not condition() and time.monotonic() < end:
        app.processEvents(QEventLoop.ProcessEventsFlag.AllEvents, 30)
        time.sleep(0.01)
    return condition()


def _settle(app, seconds: float = 0.8) -> None:
    _wait(app, lambda: False, seconds)  # let thumbnails arrive and repaint


def _save(widget, path: Path) -> None:
    from PySide6.QtGui import QImage

    img = widget.grab().toImage().convertToFormat(QImage.Format.Format_RGB888)
    img.save(str(path), "PNG", 0)  # 0: smallest file
    print(f"wrote {path} ({path.stat().st_size // 1024} KB)")


def _names_from_truth(folder: Path):
    """Plausible labels for the pictured session: the demo's truth names, when the truth file is there."""
    truth_csv = ROOT / "resources" / "demo_truth.csv"
    if not truth_csv.is_file():
        return None
    from app.demo import load_demo_truth

    truth = load_demo_truth(truth_csv)
    return lambda members: Counter(truth.get(m, "part").replace("_", " ") for m in members).most_common(1)[0][0]


def render(out: Path, source: Path) -> list[Path]:
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    from PySide6.QtCore import QSettings, Qt
    from PySide6.QtWidgets import QApplication

    from app.main_window import MainWindow

    out = out.resolve()
    source = source.resolve()
    out.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix="kinfold-shots-"))
    home = tmp / "home"
    (home / ".config").mkdir(parents=True)
    saved_env = {k: os.environ.get(k) for k in ("HOME", "XDG_CONFIG_HOME")}
    saved_cwd = os.getcwd()
    # A clean home and settings folder, and the home as working folder: the export below writes to a
    # relative destination, so its report names no machine path either.
    os.environ.update(HOME=str(home), XDG_CONFIG_HOME=str(home / ".config"))
    os.chdir(home)
    app = QApplication.instance() or QApplication(sys.argv[:1])
    written = []
    try:
        folder = home / "spare-parts"
        shutil.copytree(source, folder, ignore=lambda _d, names: [n for n in names if n == ".kinfold"])
        settings = QSettings(str(home / ".config" / "kinfold.ini"), QSettings.Format.IniFormat)
        w = MainWindow(settings)
        w.resize(*SIZE)
        w.show()
        w.start.show_recent(w.recent_folders())
        _settle(app, 0.3)
        _save(w, out / "1-start.png")
        written.append(out / "1-start.png")

        w.open_folder(str(folder))
        w.statusBar().clearMessage()  # it names the folder by its full path, here a temporary one
        bar = w.scan_page.progress.bar
        text = w.scan_page.progress.text
        _wait(app, lambda: ("embedded" in text.text() and bar.value() > bar.maximum() * 0.4) or bool(w.groups), 300)
        _save(w, out / "2-scan.png")
        written.append(out / "2-scan.png")
        if not _wait(app, lambda: bool(w.groups), 300):
            raise SystemExit("the scan did not finish in 5 minutes")

        name_of = _names_from_truth(folder) or (lambda members: "part")
        accepted: list[str] = []
        for _ in range(3):  # a session under way: a few groups accepted, through the window
            g = w.current()
            accepted += g.members
            w.group_page.label.setText(name_of(g.members))
            w.accept()
            _wait(app, w.idle, 60)  # the decision runs on the engine thread
        g = w.current()
        w.group_page.label.setText(name_of(g.members))
        w.group_page.grid.setFocus()
        for row in (2, 5):
            if row < len(g.members):
                w.group_model.toggle(row)
        w.group_page.grid.setCurrentIndex(w.group_model.index(1))
        w.group_page.say(f"{len(w.group_model.taken_out())} taken out: they go back to the pool when you accept.")
        _settle(app, 1.5)
        _save(w, out / "3-group.png")
        written.append(out / "3-group.png")

        w.help.toggle()
        _settle(app, 0.2)
        _save(w, out / "4-keys.png")
        written.append(out / "4-keys.png")
        w.help.toggle()

        w.preview(g.members[0])
        dlg = w.last_preview
        _wait(app, lambda: bool(dlg.near_model.paths), 30)
        dlg.resize(1000, 720)
        _settle(app, 1.2)
        _save(dlg, out / "5-preview.png")
        written.append(out / "5-preview.png")
        dlg.close()


        w.open_review()
        _wait(app, w.idle, 60)
        grid = w.review_page.grid
        grid.selectionModel().select(w.review_model.index(0), grid.selectionModel().SelectionFlag.Select)
        _settle(app, 1.5)
        _save(w, out / "6-review.png")
        written.append(out / "6-review.png")

        # 12: the preview at 100 % and more, moved with the arrow keys, the neighbours with their labels.
        from PySide6.QtTest import QTest
        w.preview(w.review_model.paths[-1])   # a typical photo of a label: its neighbours carry labels
        dlg = w.last_preview
        _wait(app, lambda: bool(dlg.near_model.paths) and dlg.picture.photo_size is not None, 30)
        dlg.resize(1000, 720)
        _settle(app, 0.5)
        for k in (Qt.Key.Key_Z, Qt.Key.Key_Plus, Qt.Key.Key_Plus, Qt.Key.Key_Plus, Qt.Key.Key_Plus,
                  Qt.Key.Key_Right, Qt.Key.Key_Down):
            QTest.keyClick(dlg.picture, k)
        _settle(app, 1.5)
        _save(dlg, out / "12-preview-zoom.png")
        written.append(out / "12-preview-zoom.png")
        dlg.close()
        w.back_to_groups()

        # 11: every photo, browsed: not labelled ones in one subfolder, two selected, a label typed.
        w.open_browse()
        page = w.browse_page
        _wait(app, lambda: w.idle() and page.folder.count() > 1 and page.total > 0, 60)
        page.state.setCurrentIndex(page.state.findData("unlabelled"))
        page.folder.setCurrentIndex(2 if page.folder.count() > 2 else 1)
        _wait(app, lambda: w.idle() and page.model.paths and all(n.startswith("no label") for n in page.model.notes), 60)
        _settle(app, 0.5)
        sel = page.grid.selectionModel()
        for row in (0, 1):
            sel.select(page.model.index(row), sel.SelectionFlag.Select)
        page.new_label.setText(name_of(page.model.paths[:1]))
        page.say("Select photos, type a label (or press its number key), Return: they are labelled.")
        _settle(app, 1.5)
        _save(w, out / "11-browse.png")
        written.append(out / "11-browse.png")
        w.back_to_groups()

        if len(w.status.by_label) >= 2:   # the mistakes list needs two labels to compare
            w.open_mistakes()
            _wait(app, lambda: w.idle() and w.mistakes_page.current() is not None, 120)
            _settle(app, 1.5)
            _save(w, out / "8-mistakes.png")
            written.append(out / "8-mistakes.png")
            w.back_to_groups()

        w.open_statistics()   # --- cli: 10-statistics ---
        st = w.last_stats
        st.resize(820, st.sizeHint().height())
        _settle(app, 0.5)
        _save(st, out / "10-statistics.png")
        written.append(out / "10-statistics.png")
        st.reject()

        w.export()
        exp = w.last_export
        exp.destination.setText("spare-parts-labels")
        exp.split.setChecked(True)
        exp.run.click()
        _wait(app, lambda: exp.written is not None or "⚠" in exp.report.text(), 60)
        _settle(app, 0.2)
        _save(exp, out / "7-export.png")
        written.append(out / "7-export.png")
        exp.reject()

        _import_shot(app, w, folder, accepted, name_of, out, written)
        _graph_shot(app, w, folder, out, written)   # --- graphprog: 14-graph-progress ---
        w.close()
    finally:
        os.chdir(saved_cwd)
        for k, v in saved_env.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
        shutil.rmtree(tmp, ignore_errors=True)
    return written


def _import_shot(app, w, folder: Path, accepted: list[str], name_of, out: Path, written: list) -> None:
    """9-import.png: the import dialog's check of an earlier labelling kept as a CSV file (the demo's true
    names for 60 photos; two of the photos labelled above carry another name there, two rows name
    photos that are not in the folder)."""
    import csv

    photos = sorted(str(p.relative_to(folder).as_posix()) for p in folder.rglob("*")
                    if p.is_file() and not p.relative_to(folder).parts[0].startswith("."))
    chosen = accepted[:2] + [p for p in photos if p not in accepted[:2]][:58]
    with open("previous-labels.csv", "w", newline="", encoding="utf-8") as f:
        out_csv = csv.writer(f)
        out_csv.writerow(["file", "category"])
        for i, p in enumerate(chosen):
            out_csv.writerow([p, "spares" if i < 2 else name_of([p])])
        out_csv.writerows([["old-scans/IMG_0412.jpg", "washer"], ["old-scans/IMG_0413.jpg", "washer"]])
    w.import_labels()
    imp = w.last_import
    imp.source.setText("previous-labels.csv")
    imp.check.click()
    _wait(app, lambda: imp.checked is not None or "⚠" in imp.message.text(), 60)
    imp.resize(900, 780)
    _settle(app, 0.3)
    _save(imp, out / "9-import.png")
    written.append(out / "9-import.png")
    imp.reject()


def _graph_shot(app, w, folder: Path, out: Path, written: list) -> None:
    """14-graph-progress.png: above, the scan page while the neighbour graph is built (step 3 with its
    count and Cancel); below, the group page once that build was cancelled (no groups, "Find groups").
    The folder is opened again without its graph cache. So that the picture catches the build midway,
    it runs in blocks of 8 photos with a 50 ms pause each; the counts shown are the build's own."""
    from PySide6.QtCore import Qt
    from PySide6.QtGui import QImage, QPainter
    from PySide6.QtTest import QTest

    from core import neighbours

    w.close_folder()
    for cache in (folder / ".kinfold").glob("graph-*.npz"):
        cache.unlink()
    block, run_blocks = neighbours._BLOCK, neighbours._run_blocks

    def paced(work, *a, **kw):
        return run_blocks(lambda item: (time.sleep(0.05), work(item))[1], *a, **kw)

    neighbours._BLOCK, neighbours._run_blocks = 8, paced
    try:
        w.open_folder(str(folder))
        w.statusBar().clearMessage()
        progress = w.scan_page.progress
        _wait(app, lambda: progress.text.text().startswith("Finding neighbours") and progress.bar.value() > 0, 300)
        top = w.grab().toImage()
        QTest.keyClick(w.scan_page, Qt.Key.Key_Escape)       # Esc on the scan page: Cancel
        _wait(app, lambda: w.job is None, 60)
        w.statusBar().clearMessage()
        _settle(app, 0.8)
        bottom = w.grab().toImage()
    finally:
        neighbours._BLOCK, neighbours._run_blocks = block, run_blocks
    sheet = QImage(top.width(), top.height() + bottom.height() + 6, QImage.Format.Format_RGB888)
    sheet.fill(Qt.GlobalColor.gray)
    painter = QPainter(sheet)
    painter.drawImage(0, 0, top)
    painter.drawImage(0, top.height() + 6, bottom)
    painter.end()
    path = out / "14-graph-progress.png"
    sheet.save(str(path), "PNG", 0)
    print(f"wrote {path} ({path.stat().st_size // 1024} KB)")
    written.append(path)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m app.screenshots", description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", default=str(ROOT / "resources" / "screenshots"))
    ap.add_argument("--folder", default=str(ROOT / "sample_images"), help="photo folder to picture")
    args = ap.parse_args(argv)
    source = Path(args.folder)
    if not source.is_dir() or not any(source.iterdir()):
        print(f"{source} is empty: make the demo first (python -m app.demo --out {source} "
              "--truth resources/demo_truth.csv)", file=sys.stderr)
        return 1
    render(Path(args.out), source)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
