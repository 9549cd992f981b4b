"""The Kinfold window: pages in a stack, the actions (menus, buttons, keys) and the engine calls they
make. Every decision goes straight to `core.project.Project`; long calls run as `Job`s."""
from __future__ import annotations

import importlib
from pathlib import Path

from PySide6.QtCore import QSettings, Qt, QTimer, Signal
from PySide6.QtGui import QAction, QKeySequence
from PySide6.QtWidgets import (QFileDialog, QFrame, QMainWindow, QSplitter, QStackedWidget, QVBoxLayout,
                               QListWidgetItem, QWidget)

from app import theme
from app.export_dialog import ExportDialog
from app.help_overlay import GRID_KEYS, HelpOverlay
from app.history import labelled_curve
from app.jobs import Job
from app.pages import GroupPage, ReviewPage, ScanPage, StartPage, action_button, scan_summary
from app.photo_grid import PhotoModel
from app.preview import PreviewDialog
from app.side_panel import SidePanel
from app.thumbnails import Thumbnails
from core.project import Project, ProjectError
from core.proposals import MIN_SPLIT
from core.store import StoreError

LOOKAHEAD = 6          # groups asked for at a time: the current one and what the side panel lists
MAX_RECENT = 8
_ENGINE_ERRORS = (ProjectError, StoreError, OSError, ValueError)


def relearning_available() -> bool:
    """True when `core.relearning` imports and offers `relearn_project` (checked each time a folder opens)."""
    try:
        mod = importlib.import_module("core.relearning")
    except Exception:
        return False
    return callable(getattr(mod, "relearn_project", None))


def relearn_summary(result: dict) -> str:
    if result.get("version") is None:
        return f"Nothing relearned: {result.get('reason', 'no reason given')}."
    text = f"Relearned: version {result['version']}"
    if "seconds" in result:
        text += f", {result['seconds']:.1f} s"
    if result.get("classifier_labels"):
        text += f"; label classifier over {result['classifier_labels']} labels"
    before, after = result.get("labelled_agreement_before"), result.get("labelled_agreement_after")
    if result.get("steps") and before is not None and after is not None:
        text += f"; neighbours sharing a photo's label {before:.2f} → {after:.2f} (on the labels it learnt from)"
    return text + "."


class MainWindow(QMainWindow):
    groups_shown = Signal()      # a new current group (or the empty state) is on screen
    job_ended = Signal(str)      # a background job finished or failed; carries its name

    def __init__(self, settings: QSettings | None = None):
        super().__init__()
        self.settings = settings or QSettings("Kinfold", "Kinfold")
        self.project: Project | None = None
        self.groups = []
        self.job: Job | None = None
        self.last_scan = None
        self.relearn_seconds: float | None = None   # time budget handed to the engine (None: its default)
        self.setWindowTitle("Kinfold")
        self.setStyleSheet(theme.STYLE)
        self.resize(1280, 820)
        self.thumbs = Thumbnails(parent=self)
        self.actions = self._make_actions()

        self.start = StartPage()
        self.scan_page = ScanPage()
        self.group_model = PhotoModel(self.thumbs, self)
        self.group_page = GroupPage(self.group_model, self.actions)
        self.side = SidePanel()
        for key in ("review", "relearn", "export"):
            self.side.buttons.addWidget(action_button(self.actions[key], compact=True))
        side_frame = QFrame()
        side_frame.setObjectName("panel")
        QVBoxLayout(side_frame).addWidget(self.side)
        self.work = QSplitter()
        self.work.addWidget(self.group_page)
        self.work.addWidget(side_frame)
        self.work.setStretchFactor(0, 4)
        self.work.setStretchFactor(1, 1)
        self.work.setSizes([940, 320])
        self.review_model = PhotoModel(self.thumbs, self)
        self.review_page = ReviewPage(self.review_model)
        self.stack = QStackedWidget()
        for page in (self.start, self.scan_page, self.work, self.review_page):
            wrap = page
            self.stack.addWidget(wrap)
        container = QWidget()
        lay = QVBoxLayout(container)
        lay.setContentsMargins(14, 10, 14, 10)
        lay.addWidget(self.stack)
        self.setCentralWidget(container)
        self.help = HelpOverlay(container, self._help_sections())
        self._make_menus()

        self.start.choose_requested.connect(self.choose_folder)
        self.start.open_requested.connect(self.open_folder)
        self.group_page.grid.typed.connect(self._start_label)
        self.group_page.grid.opened.connect(self.preview)
        self.review_page.grid.opened.connect(self.preview)
        self.review_page.grid.typed.connect(lambda t: (self.review_page.new_label.setFocus(),
                                                       self.review_page.new_label.setText(t)))
        self.review_page.labels.currentItemChanged.connect(lambda it, _: it and self._show_review(
            it.data(Qt.ItemDataRole.UserRole)))
        self.review_page.relabel.clicked.connect(self.relabel_selected)
        self.review_page.remove.clicked.connect(self.remove_selected)
        self.review_page.back.connect(self.back_to_groups)
        self.side.label_chosen.connect(self.open_review)
        self.stack.currentChanged.connect(lambda _: self._sync_actions())
        self.start.show_recent(self.recent_folders())
        self._sync_actions()

    # -- actions ------------------------------------------------------------------------------
    def _make_actions(self) -> dict[str, QAction]:
        spec = [  # key, text, shortcuts, section, slot
            ("accept", "Accept", ["Return", "Enter"], "Group", self.accept),
            ("toggle", "Take out / put back", ["Space"], "Group", self.toggle_member),
            ("split", "Split", ["Ctrl+D"], "Group", self.split),
            ("later", "Later", ["Ctrl+L"], "Group", self.later),
            ("aside", "Set aside", ["Ctrl+N"], "Group", self.set_aside),
            ("undo", "Undo", ["Ctrl+Z"], "Group", self.undo),
            ("preview", "Preview", ["Ctrl+P"], "Views", self.preview),
            ("review", "Review labels", ["Ctrl+R"], "Views", self.open_review),
            ("help", "Keys", ["F1", "?"], "Views", lambda: self.help.toggle()),
            ("open", "Open folder…", ["Ctrl+O"], "Folder", self.choose_folder),
            ("export", "Export…", ["Ctrl+E"], "Folder", self.export),
            ("relearn", "Relearn", ["Ctrl+Shift+R"], "Folder", self.relearn),
            ("close", "Close folder", ["Ctrl+W"], "Folder", self.close_folder),
            ("quit", "Quit", ["Ctrl+Q"], "Folder", self.close),
        ]
        tips = {
            "accept": "Label the group (all but the taken-out photos) with the label in the field",
            "toggle": "Take the photo under the keyboard outline out of the group, or put it back",
            "split": f"Break the group into two parts that are each more alike (groups of {MIN_SPLIT} or more)",
            "later": "Leave this group; its photos come back after everything else",
            "aside": "Mark the taken-out photos — or, if none, the whole group — as belonging to no class",
            "undo": "Reverse the last decision (repeat to go further back)",
            "preview": "Show the photo full size with its nearest photos (or double-click it)",
            "relearn": "Relearn from the decisions so far, then propose again",
        }
        actions = {}
        for key, text, keys, section, slot in spec:
            a = QAction(text, self)
            a.setShortcuts([QKeySequence(k) for k in keys])
            a.setIconText(text)
            a.setToolTip(f"{tips.get(key, text)}  ({' or '.join(keys)})")
            a.setProperty("section", section)
            a.triggered.connect(lambda _=False, f=slot: f())
            self.addAction(a)
            actions[key] = a
        return actions

    def _make_menus(self) -> None:
        bar = self.menuBar()
        for title, keys in (("&Folder", ("open", "export", "relearn", "close", "quit")),
                            ("&Group", ("accept", "toggle", "split", "later", "aside", "undo")),
                            ("&View", ("preview", "review", "help"))):
            menu = bar.addMenu(title)
            for k in keys:
                menu.addAction(self.actions[k])

    def _help_sections(self):
        sections: dict[str, list] = {}
        for a in self.actions.values():
            keys = "  or  ".join(s.toString(QKeySequence.SequenceFormat.NativeText) for s in a.shortcuts())
            sections.setdefault(a.property("section"), []).append((keys, a.text()))
        return [(t, rows) for t, rows in sections.items()] + [("In the grid", GRID_KEYS)]

    def _sync_actions(self) -> None:
        page = self.stack.currentWidget()
        idle = self.job is None and self.project is not None
        on_group = idle and page is self.work and bool(self.groups)
        for k in ("accept", "toggle", "split", "later", "aside", "preview"):
            self.actions[k].setEnabled(on_group)
        # The engine offers a split only for groups large enough to hold two parts worth confirming.
        self.actions["split"].setEnabled(on_group and self.current().splittable)
        self.actions["preview"].setEnabled(idle and page in (self.work, self.review_page))
        self.actions["undo"].setEnabled(idle and page in (self.work, self.review_page))
        self.actions["review"].setEnabled(idle and page is self.work)
        self.actions["export"].setEnabled(idle and page in (self.work, self.review_page))
        self.actions["relearn"].setEnabled(idle and page is self.work)
        self.actions["close"].setEnabled(self.project is not None)
        self.actions["open"].setEnabled(self.job is None)

    def _engine(self, call, *args, where=None):
        """Run one engine call; its refusal is shown where the user is looking, never raised."""
        try:
            return call(*args), None
        except _ENGINE_ERRORS as exc:
            (where or self.group_page).say(str(exc), problem=True)
            return None, exc

    # -- folders ------------------------------------------------------------------------------
    def recent_folders(self) -> list[str]:
        value = self.settings.value("recent", [])
        folders = [value] if isinstance(value, str) else list(value or [])
        return [f for f in folders if Path(f).is_dir()]

    def _remember(self, folder: Path) -> None:
        folders = [str(folder)] + [f for f in self.recent_folders() if f != str(folder)]
        self.settings.setValue("recent", folders[:MAX_RECENT])
        self.start.show_recent(folders[:MAX_RECENT])

    def choose_folder(self) -> None:
        start = self.recent_folders()[0] if self.recent_folders() else str(Path.home())
        folder = QFileDialog.getExistingDirectory(self, "Choose a photo folder", start)
        if folder:
            self.open_folder(folder)

    def open_folder(self, folder: str) -> bool:
        if self.job is not None:
            self.statusBar().showMessage("wait for the running task to finish first")
            return False
        self.close_folder()
        try:
            self.project = Project.open(folder)
        except (ProjectError, StoreError) as exc:
            self.start.show_error(str(exc))
            self.stack.setCurrentWidget(self.start)
            return False
        self.start.show_error(None)
        self._remember(self.project.folder)
        self.thumbs.set_folder(self.project.folder)
        self.setWindowTitle(f"Kinfold — {self.project.folder.name}")
        self.statusBar().showMessage(str(self.project.folder))
        self.actions["relearn"].setVisible(relearning_available())
        self.scan_page.title.setText(f"Reading {self.project.folder.name}")
        self.stack.setCurrentWidget(self.scan_page)
        self._run("scan", self.project.scan, self.scan_page.progress, self._scanned)
        return True

    def close_folder(self) -> None:
        if self.job is not None:
            self.job.cancel()
            self.job.wait(120)
            self.job = None
        self.thumbs.forget_queue()
        if self.project is not None:
            self.project.close()
            self.project = None
        self.groups = []
        self.group_model.set_photos([])
        self.review_model.set_photos([])
        self.setWindowTitle("Kinfold")
        self.stack.setCurrentWidget(self.start)
        self._sync_actions()

    def closeEvent(self, event):
        self.close_folder()
        self.thumbs.shutdown()
        super().closeEvent(event)

    # -- background jobs ----------------------------------------------------------------------
    def _run(self, name: str, call, progress_widget, on_done) -> Job:
        """An engine call taking progress= and cancel=, as a Job."""
        return self._start_job(name, lambda progress, cancel: call(progress=progress, cancel=cancel),
                               progress_widget, on_done)

    def _start_job(self, name: str, work, progress_widget, on_done, cancellable: bool = True) -> Job:
        job = self.job = Job(name, work, self)
        progress_widget.attach(job)
        progress_widget.cancel_button.setEnabled(cancellable)

        def ended(handler, value):
            if self.job is not job:
                return  # the folder was closed meanwhile; nothing to show
            self.job = None
            self._sync_actions()
            handler(value)
            self.job_ended.emit(name)

        job.finished.connect(lambda result: ended(on_done, result))
        job.failed.connect(lambda message: ended(lambda m: self._job_failed(name, m), message))
        self._sync_actions()
        return job.start()

    def _job_failed(self, name: str, message: str) -> None:
        if name == "scan" or self.stack.currentWidget() is self.scan_page:
            self.close_folder()
            self.start.show_error(f"{name} failed: {message}")
        else:
            self.group_page.busy.hide()
            self.group_page.say(f"{name} failed: {message}", problem=True)

    def _scanned(self, report) -> None:
        self.last_scan = report
        self.side.show_skipped(report.skipped)
        self.group_page.say(scan_summary(report))
        self.scan_page.title.setText("Finding groups")
        self._propose_in_background(self.scan_page.progress)

    def _propose_in_background(self, progress_widget) -> None:
        """The first proposals after a scan or a relearn build the neighbour graph: not on the GUI thread."""
        project = self.project

        def work(progress, cancel):
            progress(0, 1, "finding neighbours and forming groups")
            return project.propose(limit=LOOKAHEAD)

        def done(groups):
            self.group_page.busy.hide()
            self.stack.setCurrentWidget(self.work)
            self._show_groups(groups)

        self._start_job("finding groups", work, progress_widget, done, cancellable=False)

    # -- the group ----------------------------------------------------------------------------
    def current(self):
        return self.groups[0] if self.groups else None

    def refresh(self) -> None:
        groups, err = self._engine(self.project.propose, LOOKAHEAD)
        self._show_groups(groups if err is None else [])

    def _show_groups(self, groups) -> None:
        self.groups = list(groups)
        g = self.current()
        self.thumbs.forget_queue()
        self.group_model.set_photos(g.members if g else [])
        self.group_page.show_group(g, 1, max(len(self.groups) - 1, 0))
        status = self.project.status()
        self.side.show_state(status, self.groups[1:], labelled_curve(self.project.store.decisions()))
        self.group_page.label.set_names(status.by_label)
        self.review_page.new_label.set_names(status.by_label)
        if len(self.groups) > 1:  # so the next group appears without waiting for its thumbnails
            nxt = self.groups[1].members
            self.thumbs.prefetch(nxt, self.group_page.grid.side_for(len(nxt)))
        self._sync_actions()
        if self.stack.currentWidget() is self.work and not self.group_page.label.hasFocus():
            self.group_page.grid.setFocus()
        self.groups_shown.emit()

    def _start_label(self, text: str) -> None:
        self.group_page.label.setFocus()
        self.group_page.label.setText(text)

    def accept(self) -> None:
        if not self._confirm_unseen():
            return
        g = self.current()
        label = self.group_page.label.text().strip()
        if not label:
            self.group_page.say("Type a label first (or pick one from the list as you type).", problem=True)
            self.group_page.label.setFocus()
            return
        drop = self.group_model.taken_out()
        _, err = self._engine(self.project.accept, g.id, label, drop)
        if err is None:
            kept = len(g.members) - len(drop)
            self.group_page.say(f"Labelled {kept} photos “{label}”" +
                                (f"; {len(drop)} taken out went back to the pool." if drop else "."))
            self.group_page.grid.setFocus()
            self.refresh()

    def _confirm_unseen(self) -> bool:
        """False while photos never on screen would be labelled and the user has not confirmed (once)."""
        return self.group_page.confirm_unseen()

    def toggle_member(self) -> None:
        idx = self.group_page.grid.currentIndex()
        if not idx.isValid():
            return
        self.group_model.toggle(idx.row())
        n = len(self.group_model.taken_out())
        self.group_page.say(f"{n} taken out: they go back to the pool when you accept." if n else
                            "All photos are in the group.")

    def split(self) -> None:
        g = self.current()
        parts, err = self._engine(self.project.split, g.id)
        if err is None:
            self.group_page.say("Split into " + " and ".join(f"{len(p.members)}" for p in parts) + " photos.")
            self.refresh()

    def later(self) -> None:
        _, err = self._engine(self.project.defer, self.current().id)
        if err is None:
            self.group_page.say("Left for later.")
            self.refresh()

    def set_aside(self) -> None:
        g = self.current()
        paths = self.group_model.taken_out() or list(g.members)
        _, err = self._engine(self.project.set_aside, paths)
        if err is None:
            self.group_page.say(f"Set {len(paths)} photos aside as no class.")
            self.refresh()

    def undo(self) -> None:
        where = self.review_page if self.stack.currentWidget() is self.review_page else self.group_page
        undone, err = self._engine(self.project.undo, where=where)
        if err is not None:
            return
        where.say(f"Undid the last {undone['kind'].replace('_', ' ')} ({undone['photos']} photos)."
                  if undone else "Nothing left to undo.")
        self.refresh()
        if where is self.review_page:
            self._fill_review(self._review_label())

    def preview(self, path: str | None = None) -> None:
        if self.project is None:
            return
        grid = self.review_page.grid if self.stack.currentWidget() is self.review_page else self.group_page.grid
        path = path or grid.current_path()
        if path:
            dlg = PreviewDialog(self.project, self.thumbs, path, self)
            dlg.setStyleSheet(theme.STYLE)
            dlg.open()
            self.last_preview = dlg

    # -- review -------------------------------------------------------------------------------
    def open_review(self, label: str | None = None) -> None:
        if self.project is None or self.job is not None:
            return
        if not self.project.status().by_label:
            self.group_page.say("No labels yet: accept a group first.", problem=True)
            return
        self.stack.setCurrentWidget(self.review_page)
        self._fill_review(label or self._side_label())
        self.review_page.grid.setFocus()

    def _side_label(self) -> str | None:
        it = self.side.labels.currentItem()
        return it.data(Qt.ItemDataRole.UserRole) if it else None

    def _review_label(self) -> str | None:
        it = self.review_page.labels.currentItem()
        return it.data(Qt.ItemDataRole.UserRole) if it else None

    def _fill_review(self, label: str | None) -> None:
        by_label = self.project.status().by_label
        if not by_label:
            self.back_to_groups()
            return
        label = label if label in by_label else next(iter(by_label))
        lst = self.review_page.labels
        lst.blockSignals(True)
        lst.clear()
        for name, count in by_label.items():
            it = QListWidgetItem(f"{name}  —  {count}")
            it.setData(Qt.ItemDataRole.UserRole, name)
            lst.addItem(it)
            if name == label:
                lst.setCurrentItem(it)
        lst.blockSignals(False)
        self._show_review(label)

    def _show_review(self, label: str) -> None:
        rows, err = self._engine(self.project.review, label, where=self.review_page)
        if err is not None:
            return
        self.review_model.set_photos([p for p, _ in rows], [f"typicality {t:.2f}" for _, t in rows])
        self.review_page.header.setText(f"“{label}”  ·  {len(rows)} photos")
        if rows:
            self.review_page.grid.setCurrentIndex(self.review_model.index(0))

    def relabel_selected(self) -> None:
        paths = self.review_page.selected_paths()
        new = self.review_page.new_label.text().strip()
        if not paths or not new:
            self.review_page.say("Select photos and type the new label first.", problem=True)
            return
        _, err = self._engine(self.project.label, paths, new, where=self.review_page)
        if err is None:
            self.review_page.say(f"Relabelled {len(paths)} photos “{new}”.")
            self.refresh()
            self._fill_review(self._review_label())

    def remove_selected(self) -> None:
        paths = self.review_page.selected_paths()
        if not paths:
            self.review_page.say("Select photos first.", problem=True)
            return
        _, err = self._engine(self.project.clear, paths, where=self.review_page)
        if err is None:
            self.review_page.say(f"Removed the label from {len(paths)} photos; they are back in the pool.")
            self.refresh()
            self._fill_review(self._review_label())

    def back_to_groups(self) -> None:
        self.stack.setCurrentWidget(self.work)
        self.refresh()

    # -- relearn and export -------------------------------------------------------------------
    def relearn(self) -> None:
        if not relearning_available():
            self.actions["relearn"].setVisible(False)
            return
        page = self.group_page
        page.busy.show()

        def done(result):
            page.say(relearn_summary(result or {}) + " Proposing again…")
            self._propose_in_background(page.busy)

        project, seconds = self.project, self.relearn_seconds
        self._run("relearning", lambda progress, cancel: project.relearn(progress=progress, seconds=seconds,
                                                                        cancel=cancel), page.busy, done)

    def export(self) -> None:
        if self.project is None or self.job is not None:
            return
        dlg = ExportDialog(self.project, self)
        dlg.setStyleSheet(theme.STYLE)
        self.last_export = dlg
        dlg.open()
