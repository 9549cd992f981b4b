"""Importing labels (Ctrl+Shift+I) and renaming a label (F2): two small dialogs; the engine calls run
on the engine thread (`app.jobs`).

The import dialog first checks (a dry run: nothing written) and shows the report, aligned as the CLI
prints it; only then does "Import" write, as one decision the window's Undo takes back. Changing the
source or an option withdraws the checked report, so what is imported is what was shown.

The rename dialog asks once when the new name is close to another label (case, spacing, punctuation
or a prefix, `core.label_names.near_duplicates`): merge into that label, or keep the name as typed.
A name that is an existing label merges the two."""
from __future__ import annotations

from pathlib import Path
from typing import Callable

from PySide6.QtGui import QFontDatabase
from PySide6.QtWidgets import (QButtonGroup, QCheckBox, QDialog, QFileDialog, QFormLayout, QHBoxLayout,
                               QLabel, QLineEdit, QPlainTextEdit, QPushButton, QRadioButton, QVBoxLayout,
                               QWidget)

from app.jobs import Job, JobProgress
from core.label_names import near_duplicates

SOURCES = (("csv", "CSV file (a path and a label column)"),
           ("coco", "COCO JSON file (each image's category)"),
           ("folders", "Class folders (each subfolder a label; photos matched by content, wherever they lie)"),
           ("subfolders", "This folder's own subfolder names"))


class ImportDialog(QDialog):
    """`on_imported(report)` is called on the GUI thread after a real import wrote a decision."""

    def __init__(self, project, parent=None, on_imported: Callable | None = None):
        super().__init__(parent)
        self.project = project
        self.on_imported = on_imported
        self.job: Job | None = None
        self.checked = None            # the dry run's report for the present settings
        self.imported = None           # the last real import's report
        self.setWindowTitle("Import labels")
        self.setMinimumWidth(760)
        self.kind = QButtonGroup(self)
        self.kinds: dict[str, QRadioButton] = {}
        kinds_box = QVBoxLayout()
        for key, text in SOURCES:
            b = QRadioButton(text)
            self.kinds[key] = b
            self.kind.addButton(b)
            kinds_box.addWidget(b)
        self.kinds["csv"].setChecked(True)
        self.source = QLineEdit()
        self.source.setPlaceholderText("the file or folder to read")
        self.choose = QPushButton("Choose…")
        self.path_column = QLineEdit()
        self.path_column.setPlaceholderText("found by name (path, file, image…)")
        self.label_column = QLineEdit()
        self.label_column.setPlaceholderText("found by name (label, class, category…)")
        self.replace = QCheckBox("Replace labels the photos already carry (default: keep them, list the conflicts)")
        self.progress = JobProgress(unit="files")
        self.progress.hide()
        self.report = QPlainTextEdit()
        self.report.setReadOnly(True)
        self.report.setFont(QFontDatabase.systemFont(QFontDatabase.SystemFont.FixedFont))
        self.report.setPlaceholderText("Check first: the report says what would be labelled, what conflicts "
                                       "and what matches no photo, before anything is written.")
        self.message = QLabel(" ")
        self.message.setObjectName("muted")
        self.message.setWordWrap(True)
        self.check = QPushButton("Check")
        self.check.setDefault(True)
        self.run = QPushButton("Import")
        self.run.setObjectName("primary")
        self.run.setEnabled(False)
        close = QPushButton("Close")

        src_row = QHBoxLayout()
        src_row.addWidget(self.source, 1)
        src_row.addWidget(self.choose)
        cols = QHBoxLayout()
        cols.addWidget(QLabel("path column"))
        cols.addWidget(self.path_column, 1)
        cols.addWidget(QLabel("label column"))
        cols.addWidget(self.label_column, 1)
        self.columns = QWidget()
        self.columns.setLayout(cols)
        kinds_w = QWidget()
        kinds_w.setLayout(kinds_box)
        form = QFormLayout()
        form.addRow("From", kinds_w)
        form.addRow("Source", src_row)
        form.addRow("CSV", self.columns)
        form.addRow("", self.replace)
        buttons = QHBoxLayout()
        buttons.addWidget(self.message, 1)
        buttons.addWidget(close)
        buttons.addWidget(self.check)
        buttons.addWidget(self.run)
        lay = QVBoxLayout(self)
        lay.addLayout(form)
        lay.addWidget(self.progress)
        lay.addWidget(self.report, 1)
        lay.addLayout(buttons)

        self.choose.clicked.connect(self._choose)
        self.check.clicked.connect(lambda: self.start(dry_run=True))
        self.run.clicked.connect(lambda: self.start(dry_run=False))
        close.clicked.connect(self.reject)
        for w in (self.source, self.path_column, self.label_column):
            w.textChanged.connect(self._withdraw)
        self.replace.toggled.connect(self._withdraw)
        self.kind.buttonToggled.connect(lambda *_: (self._sync(), self._withdraw()))
        self._sync()
        self.source.setFocus()        # typing a path is the first thing to do

    def chosen(self) -> str:
        return next(k for k, b in self.kinds.items() if b.isChecked())

    def _sync(self) -> None:
        kind = self.chosen()
        self.source.setEnabled(kind != "subfolders")
        self.choose.setEnabled(kind != "subfolders")
        self.columns.setEnabled(kind == "csv")

    def _choose(self) -> None:
        kind = self.chosen()
        start = self.source.text() or str(Path(self.project.folder).parent)
        if kind == "folders":
            path = QFileDialog.getExistingDirectory(self, "Class folders to import", start)
        else:
            path, _ = QFileDialog.getOpenFileName(self, "Labels to import", start,
                                                  "CSV (*.csv *.txt);;All files (*)" if kind == "csv"
                                                  else "COCO JSON (*.json);;All files (*)")
        if path:
            self.source.setText(path)

    def _withdraw(self) -> None:
        """The settings changed: a report checked for other settings no longer stands for an import."""
        if self.checked is not None:
            self.checked = None
            self.run.setEnabled(False)
            self.message.setText("Settings changed: check again before importing.")

    def arguments(self) -> dict | None:
        kind = self.chosen()
        args: dict = dict(replace=self.replace.isChecked())
        if kind == "subfolders":
            args["subfolders"] = True
            return args
        text = self.source.text().strip()
        if not text:
            self.message.setText("⚠  Choose the file or folder to import from.")
            return None
        args[kind] = Path(text).expanduser()
        if kind == "csv":
            args["path_column"] = self.path_column.text().strip() or None
            args["label_column"] = self.label_column.text().strip() or None
        return args

    def running(self) -> bool:
        return self.job is not None and not self.job.wait(0)

    def start(self, dry_run: bool) -> Job | None:
        if self.running():
            return None
        if not dry_run and self.checked is None:
            self.message.setText("⚠  Check first.")
            return None
        args = self.arguments()
        if args is None:
            return None
        project = self.project
        self.job = Job("checking" if dry_run else "importing",
                       lambda progress, cancel: project.import_labels(**args, dry_run=dry_run, progress=progress,
                                                                      cancel=cancel), self)
        self.progress.show()
        self.progress.attach(self.job)
        self.check.setEnabled(False)
        self.run.setEnabled(False)
        self.message.setText("Checking…" if dry_run else "Importing…")
        self.job.finished.connect(lambda rep: self._finished(rep, dry_run))
        self.job.failed.connect(self._failed)
        return self.job.start()

    def _finished(self, report, dry_run: bool) -> None:
        self.progress.hide()
        self.check.setEnabled(True)
        self.report.setPlainText("\n".join(report.lines()))
        if report.cancelled:
            self.message.setText("Cancelled: nothing was imported.")
        elif dry_run:
            self.checked = report
            self.run.setEnabled(report.labelled > 0)
            self.message.setText(f"Checked: importing would label {report.labelled} photos. Import (Return) "
                                 "writes it." if report.labelled else "Nothing to import with these settings.")
            if report.labelled:
                self.run.setDefault(True)
                self.run.setFocus()
        else:
            self.imported = report
            self.checked = None
            self.check.setDefault(True)
            self.message.setText(f"Imported: {report.labelled} photos labelled. Undo (Ctrl+Z) takes the whole "
                                 "import back." if report.decision is not None else "Nothing was imported.")
            if self.on_imported and report.decision is not None:
                self.on_imported(report)
        self._closing_ended()

    def _failed(self, message: str) -> None:
        self.progress.hide()
        self.check.setEnabled(True)
        self.run.setEnabled(False)
        self.checked = None
        self.message.setText(f"⚠  {message}")
        self._closing_ended()

    def reject(self) -> None:
        """Close, or, while a job runs, once it has ended (the dialog never goes away with its job)."""
        if not self.running():
            super().reject()
            return
        self._closing = True
        self.message.setText("Closing once the import has finished…")

    def _closing_ended(self) -> None:
        if getattr(self, "_closing", False):
            self._closing = False
            super().reject()


class RenameDialog(QDialog):
    """The new name for `old`; `on_chosen(old, new, confirm)` on the GUI thread once settled."""

    def __init__(self, old: str, names: list[str], on_chosen: Callable, parent=None):
        super().__init__(parent)
        self.old = old
        self.others = [n for n in names if n != old]
        self.on_chosen = on_chosen
        self.asked_for: str | None = None     # the name the user was asked about once
        self.setWindowTitle("Rename label")
        self.setMinimumWidth(460)
        self.field = QLineEdit(old)
        self.field.selectAll()
        self.note = QLabel(f"New name for “{old}”. An existing label's name merges the two; Undo takes it back.")
        self.note.setWordWrap(True)
        self.note.setObjectName("muted")
        self.merge = QPushButton()
        self.merge.setAutoDefault(False)
        self.merge.hide()
        self.ok = QPushButton("Rename")
        self.ok.setObjectName("primary")
        self.ok.setDefault(True)
        cancel = QPushButton("Cancel")
        cancel.setAutoDefault(False)
        buttons = QHBoxLayout()
        buttons.addStretch(1)
        buttons.addWidget(cancel)
        buttons.addWidget(self.merge)
        buttons.addWidget(self.ok)
        lay = QVBoxLayout(self)
        lay.addWidget(self.field)
        lay.addWidget(self.note)
        lay.addLayout(buttons)
        self.ok.clicked.connect(self.settle)
        self.merge.clicked.connect(lambda: self._chosen(self.merge.property("target"), False))
        cancel.clicked.connect(self.reject)
        self.field.textChanged.connect(self._edited)

    def _edited(self) -> None:
        if self.asked_for is not None:
            self.asked_for = None
            self.merge.hide()
            self.ok.setText("Rename")
            self.note.setText(f"New name for “{self.old}”. An existing label's name merges the two; Undo takes "
                              "it back.")

    def settle(self) -> None:
        new = " ".join(self.field.text().split())
        if not new or new == self.old:
            self.note.setText("⚠  Type a new name." if not new else f"⚠  It is already called “{new}”.")
            return
        if new in self.others:
            self._chosen(new, False)          # merge: the name was typed exactly
            return
        near = near_duplicates(new, self.others)
        if near and self.asked_for != new:
            self.asked_for = new
            self.note.setText(f"“{new}” would be a new label, close to “{near[0]}” (case, spacing or the first "
                              f"letters). Merge into “{near[0]}”, or keep “{new}” as a new label?")
            self.merge.setText(f"Merge into “{near[0]}”")
            self.merge.setProperty("target", near[0])
            self.merge.show()
            self.ok.setText(f"Keep “{new}”")
            return
        self._chosen(new, True)

    def _chosen(self, new: str, confirm: bool) -> None:
        self.accept()
        self.on_chosen(self.old, new, confirm)
