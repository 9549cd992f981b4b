"""Export: CSV, COCO JSON and/or class folders (optionally split train/val/test) into one destination
folder, as one all-or-nothing export on the engine thread; the dialog then says what was written.

When the engine refuses because the export would replace something Kinfold did not write (a file of
the user's, a folder that is not an earlier export), nothing is written; the dialog shows the
one-line reason and offers the explicit choice ("Replace labels.csv"), which exports again with
overwrite=True. The choice holds for that one export only."""
from __future__ import annotations

from pathlib import Path

from PySide6.QtWidgets import (QCheckBox, QDialog, QDoubleSpinBox, QFileDialog, QFormLayout, QHBoxLayout,
                               QLabel, QLineEdit, QPushButton, QRadioButton, QVBoxLayout, QWidget)

from app.jobs import Job, JobProgress
from core.export import WHY_LINKS, ExportError, ExportRefused, folder_export_mode

CSV_NAME, COCO_NAME, FOLDERS_NAME = "labels.csv", "labels.coco.json", "classes"


def _count_text(counts: dict) -> str:
    return ", ".join(f"{k} {v}" for k, v in counts.items())


def export_report(written: dict) -> str:
    lines = []
    if "csv" in written:
        column = ", with a split column" if written["csv"].get("split") else ""
        lines.append(f"CSV: {written['csv']['rows']} rows{column} → {written['csv']['path']}")
    if "coco" in written:
        w = written["coco"]
        for part, one in (w.items() if "path" not in w else [(None, w)]):   # one file per split
            lines.append(f"COCO JSON{f' ({part})' if part else ''}: {one['images']} images, "
                         f"{one['annotations']} annotations, {one['categories']} categories → {one['path']}")
    if "folders" in written:
        w = written["folders"]
        counts = w["counts"]
        if counts and isinstance(next(iter(counts.values())), dict):
            for part, by_label in counts.items():
                lines.append(f"folders/{part}: {sum(by_label.values())} photos in {len(by_label)} classes")
        else:
            lines.append(f"folders: {sum(counts.values())} photos in {len(counts)} classes")
        lines.append(f"    → {w['path']}")
        mode = w.get("mode")
        if mode:
            lines.append("    the photos are " + ("symbolic links to the originals" if mode == "link" else "copies"))
    return "\n".join(lines)


def run_export(project, destination: Path, csv: bool, coco: bool, folders: bool, split, mode: str,
               overwrite: bool = False) -> dict:
    """One export of the chosen formats into `destination`, all or nothing (`Project.export`). Returns
    what was written ({"csv": {"path", "rows"}, ...}), or {"refused": ExportRefused} when it would
    replace something Kinfold did not write (nothing is changed; `overwrite=True` goes ahead)."""
    paths = {"csv": destination / CSV_NAME if csv else None, "coco": destination / COCO_NAME if coco else None,
             "folders": destination / FOLDERS_NAME if folders else None}
    # The destination folder itself is made here (its parent must exist), and removed again if the
    # export writes nothing, so a refused export leaves no trace.
    made = not destination.exists()
    if made:
        try:
            destination.mkdir()
        except FileNotFoundError:
            raise ExportError(f"Cannot export to {destination}: the folder {destination.parent} does not "
                              "exist; create it first or choose another destination.") from None
        except OSError as exc:
            raise ExportError(f"Cannot export to {destination}: {exc.strerror or exc}") from None
    try:
        result = project.export(**paths, split=split, mode=mode, overwrite=overwrite)
    except BaseException as exc:
        if made:
            try:
                destination.rmdir()
            except OSError:
                pass
        if isinstance(exc, ExportRefused):
            return {"refused": exc}
        raise
    written: dict = {}
    if "csv" in result:
        written["csv"] = {"path": str(paths["csv"]), "rows": result["csv"], "split": split is not None}
    if "coco" in result:
        if split:   # one file per split, named beside the one asked for (core.export.split_file_name)
            written["coco"] = {part: {**one, "path": str(paths["coco"].parent / Path(one["path"]).name)}
                               for part, one in result["coco"].items()}
        else:
            written["coco"] = {"path": str(paths["coco"]), **result["coco"]}
    if "folders" in result:
        written["folders"] = {"path": str(paths["folders"]), "counts": result["folders"],
                              "mode": folder_export_mode(paths["folders"])}
    return written


class ExportDialog(QDialog):
    def __init__(self, project, parent=None, on_written=None):
        super().__init__(parent)
        self.project = project
        self.on_written = on_written
        self.job: Job | None = None
        self.written: dict | None = None
        self.setWindowTitle("Export labels")
        self.setMinimumWidth(720)
        folder = Path(project.folder)
        self.destination = QLineEdit(str(folder.parent / f"{folder.name}-labels"))
        choose = QPushButton("Choose…")
        self.csv = QCheckBox(f"CSV table ({CSV_NAME})")
        self.coco = QCheckBox(f"COCO JSON ({COCO_NAME})")
        self.folders = QCheckBox(f"Class folders ({FOLDERS_NAME}/<label>/…)")
        for box in (self.csv, self.coco, self.folders):
            box.setChecked(True)
        self.split = QCheckBox("Split into train / val / test")
        self.fractions = [QDoubleSpinBox() for _ in range(3)]
        for spin, value in zip(self.fractions, (0.8, 0.1, 0.1)):
            spin.setRange(0.0, 1.0)
            spin.setSingleStep(0.05)
            spin.setDecimals(2)
            spin.setValue(value)
        self.link = QRadioButton("links to the photos (default)")
        self.copy = QRadioButton("copies")
        self.link.setChecked(True)
        self.progress = JobProgress(unit="steps")
        self.progress.hide()
        self.report = QLabel()
        self.report.setWordWrap(True)
        self.report.setObjectName("muted")
        self.run = QPushButton("Export")
        self.run.setObjectName("primary")
        self.run.setDefault(True)
        # The explicit choice after a refusal; never the default button, so Return cannot replace a file.
        self.replace = QPushButton()
        self.replace.setAutoDefault(False)
        self.replace.hide()
        self.refused: ExportRefused | None = None
        close = QPushButton("Close")

        dest_row = QHBoxLayout()
        dest_row.addWidget(self.destination, 1)
        dest_row.addWidget(choose)
        fraction_row = QHBoxLayout()
        for name, spin in zip(("train", "val", "test"), self.fractions):
            fraction_row.addWidget(QLabel(name))
            fraction_row.addWidget(spin)
            fraction_row.addSpacing(8)
        fraction_row.addStretch(1)
        split_row = QVBoxLayout()
        split_row.addWidget(self.split)
        split_row.addLayout(fraction_row)
        mode_row = QHBoxLayout()
        mode_row.addWidget(self.link)
        mode_row.addWidget(self.copy)
        mode_row.addStretch(1)
        form = QFormLayout()
        form.addRow("Destination", dest_row)
        what = QVBoxLayout()
        for box in (self.csv, self.coco, self.folders):
            what.addWidget(box)
        what_w = QWidget()
        what_w.setLayout(what)
        form.addRow("Write", what_w)
        form.addRow("Split", split_row)
        form.addRow("Photos as", mode_row)
        self.why_links = QLabel(WHY_LINKS)
        self.why_links.setWordWrap(True)
        self.why_links.setObjectName("muted")
        form.addRow("", self.why_links)
        buttons = QHBoxLayout()
        buttons.addStretch(1)
        buttons.addWidget(self.replace)
        buttons.addWidget(close)
        buttons.addWidget(self.run)
        lay = QVBoxLayout(self)
        lay.addLayout(form)
        lay.addWidget(self.progress)
        lay.addWidget(self.report)
        lay.addLayout(buttons)

        choose.clicked.connect(self._choose)
        self.run.clicked.connect(lambda: self.start())
        self.replace.clicked.connect(lambda: self.start(overwrite=True))
        close.clicked.connect(self.reject)
        for box in (self.csv, self.coco, self.folders):
            box.toggled.connect(self._sync)
        self.split.toggled.connect(self._sync)
        # A refusal is about the destination and formats it was given: any change withdraws the offer.
        self.destination.textChanged.connect(self._withdraw)
        for box in (self.csv, self.coco, self.folders, self.split, self.link, self.copy):
            box.toggled.connect(self._withdraw)
        for spin in self.fractions:
            spin.valueChanged.connect(self._withdraw)
        self._sync()

    def _sync(self) -> None:
        # One split serves every format: a CSV column, one COCO file per split, a folder level.
        anything = self.csv.isChecked() or self.coco.isChecked() or self.folders.isChecked()
        self.split.setEnabled(anything)
        for spin in self.fractions:
            spin.setEnabled(anything and self.split.isChecked())
        self.link.setEnabled(self.folders.isChecked())
        self.copy.setEnabled(self.folders.isChecked())

    def _choose(self) -> None:
        d = QFileDialog.getExistingDirectory(self, "Export into", self.destination.text())
        if d:
            self.destination.setText(d)

    def _withdraw(self) -> None:
        if self.refused is not None:
            self.refused = None
            self.replace.hide()
            self.report.setText("")

    def start(self, overwrite: bool = False) -> Job | None:
        """Export what is chosen; `overwrite`: the user chose to replace what was refused."""
        if self.running():
            return None
        if not (self.csv.isChecked() or self.coco.isChecked() or self.folders.isChecked()):
            self.report.setText("⚠  choose at least one thing to write")
            return None
        text = self.destination.text().strip()
        if not text:
            self.report.setText("⚠  choose a destination folder")
            return None
        split = tuple(s.value() for s in self.fractions) if self.split.isChecked() else None
        args = (self.project, Path(text).expanduser(), self.csv.isChecked(), self.coco.isChecked(),
                self.folders.isChecked(), split, "copy" if self.copy.isChecked() else "link", overwrite)
        self.job = Job("exporting", lambda progress, cancel: run_export(*args), self)
        self.progress.show()
        self.progress.attach(self.job)
        self.progress.cancel_button.setEnabled(False)  # one all-or-nothing write: nothing to stop halfway
        self.run.setEnabled(False)
        self.replace.hide()
        self.refused = None
        self.report.setText("Writing " + ", ".join(n for n, box in (("the CSV table", self.csv),
                                                                    ("the COCO file", self.coco),
                                                                    ("the class folders", self.folders))
                                                   if box.isChecked()) + "…")
        self.job.finished.connect(self._finished)
        self.job.failed.connect(self._failed)
        return self.job.start()

    def _finished(self, written: dict) -> None:
        if "refused" in written:
            self.refused = written["refused"]
            self.report.setText(f"⚠  {self.refused.reason}. Nothing was written.")
            self.replace.setText(self.refused.offer)
            self.replace.setToolTip(str(self.refused))
            self.replace.setVisible(not getattr(self, "_closing", False))
            self._ended()
            return
        self.written = written
        self.report.setText("Written:\n" + export_report(written))
        self.adjustSize()   # the report can be longer than the room the dialog had
        self._ended()
        if self.on_written:
            self.on_written(written)

    def _failed(self, message: str) -> None:
        self.report.setText(f"⚠  {message}" + ("" if "nothing was changed" in message else " Nothing was written."))
        self._ended()

    def running(self) -> bool:
        return self.job is not None and not self.job.wait(0)

    def reject(self) -> None:
        """Close, or (while writing) close once the export has ended: the dialog never goes away with
        its worker still running, and an export is never left half done."""
        if not self.running():
            super().reject()
            return
        self._closing = True
        self.run.setEnabled(False)
        self.report.setText("Closing once the export has finished…")

    def _ended(self) -> None:
        self.progress.hide()
        self.run.setEnabled(True)
        if getattr(self, "_closing", False):
            self._closing = False
            super().reject()
