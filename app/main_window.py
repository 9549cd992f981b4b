"""The Kinfold window: pages in a stack, the actions (menus, buttons, keys) and the engine calls they
make.

Every engine call runs on the one engine thread (`app.jobs`), never on the GUI thread: a decision
(accept, split, later, set aside, undo, relabel, remove) is a job that records it, asks for the next
proposals and the status, and hands back a `View`; the GUI thread only applies views. The GUI thread
never touches `Project`, so the store and the engine's caches are used from one thread at a time.

While a decision is in flight (tens of milliseconds), keys typed in the window are held and delivered,
in order, once its result is on screen: letters, arrows and Space arrive where they would have, so no
typing is lost. A key that would decide (Return, a decision's shortcut) is not replayed but refused with
a message: it was pressed before the group it would decide on was shown, so nothing is decided on a
group nobody has seen. Mouse clicks meanwhile are refused with a message for the same reason.
"""
from __future__ import annotations

import dataclasses
import functools
import gc
import importlib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable

from PySide6.QtCore import QEvent, QItemSelectionModel, QKeyCombination, QSettings, Qt, QTimer, Signal
from PySide6.QtGui import QAction, QKeyEvent, QKeySequence
from PySide6.QtWidgets import (QApplication, QFileDialog, QFrame, QMainWindow, QMessageBox, QPushButton,
                               QSplitter, QStackedWidget, QVBoxLayout, QListWidgetItem, QWidget)

from app import graph_progress, jobs, theme
from app.export_dialog import ExportDialog
from app.help_overlay import GRID_KEYS, HelpOverlay
from app.history import Curve
from app import backdrop_menu
from app.jobs import Job
from app.mistakes_page import KEYS as MISTAKES_KEYS, MistakesPage
from app.pages import GroupPage, ReviewPage, ScanPage, StartPage, action_button, scan_summary
from app.lazy_grid import LazyPhotoModel, review_lists
from app.photo_grid import PhotoModel
from app.preview import KEYS as PREVIEW_KEYS, PreviewDialog
from app.browse_page import KEYS as BROWSE_KEYS, PAGE as BROWSE_PAGE, BrowseModel, BrowsePage
from app.side_panel import SidePanel, photos
from app.thumbnails import Thumbnails
from core.label_names import near_duplicates, number_keys, shown_suggestion
from core.project import Project, ProjectError
from core.proposals import MIN_SPLIT
from core.store import StoreError

LOOKAHEAD = 6          # groups asked for at a time: the current one and what the side panel lists
MAX_RECENT = 8
MAX_HELD_KEYS = 200    # type-ahead while a decision is in flight; more than this is refused
MISTAKES_LIMIT = 200   # likely mistakes listed at a time (the ranking is redone when the page opens)
# What the status bar says when an unavailable action's key is pressed (others: "<action> is not available here").
UNAVAILABLE = {"split": f"Split works on groups of {MIN_SPLIT} photos or more",
               "undo": "Nothing to undo", "redo": "Nothing to redo: redo follows an undo"}
_ENGINE_ERRORS = (ProjectError, StoreError, OSError, ValueError)
_KEY_EVENTS = (QEvent.Type.KeyPress, QEvent.Type.KeyRelease, QEvent.Type.ShortcutOverride)
# Presses only: a release that ends a drag begun before (a splitter, a scroll bar) must still arrive.
_MOUSE_EVENTS = (QEvent.Type.MouseButtonPress, QEvent.Type.MouseButtonDblClick)


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


@dataclass
class View:
    """What the engine thread hands back after an action: the action's own result (or its one-line
    refusal), the next proposals, the status, and what the review page shows."""
    result: Any = None
    error: str | None = None
    groups: list = dataclasses.field(default_factory=list)
    status: Any = None
    review: tuple[str, tuple[list, list]] | None = None   # (label, (paths, notes)), least typical first
    curve: Curve | None = None                    # only when the log was replayed (a folder opened)
    graph_missing: bool = False                   # no neighbour graph (its build was stopped): no groups


def engine_view(project: Project, call: Callable | None = None, review_label: str | None = None,
                replay: bool = False) -> View:
    """Runs on the engine thread: the action, then everything the window shows next."""
    view = View()
    if call is not None:
        try:
            view.result = call(project)
        except _ENGINE_ERRORS as exc:
            view.error = str(exc)
    # The current group keeps its number; the next-up list is a peek. Without the graph (its build was
    # stopped) no groups are formed here: the window builds it with progress (app/graph_progress.py).
    view.graph_missing = not project.graph_ready()
    view.groups = [] if view.graph_missing else project.propose(limit=LOOKAHEAD, hold=1)
    view.status = project.status()
    if review_label is not None:
        label = review_label if review_label in view.status.by_label else next(iter(view.status.by_label), None)
        if label is not None:
            view.review = (label, review_lists(project.review(label)))  # built here, not on the GUI thread
    if replay:
        view.curve = Curve.from_decisions(project.store.decisions())
    return view


def shown(g):
    """The proposal as the window shows it: a suggestion it should not show is dropped (never typed
    into the label field either)."""
    if g is None:
        return None
    label = shown_suggestion(g.kind, g.suggested_label, g.confidence)
    return g if label == g.suggested_label else dataclasses.replace(g, suggested_label=None, confidence=None)


class MainWindow(QMainWindow):
    groups_shown = Signal()      # a new current group (or the empty state) is on screen
    job_ended = Signal(str)      # a background job finished or failed; carries its name

    def __init__(self, settings: QSettings | None = None):
        super().__init__()
        self.settings = settings or QSettings("Kinfold", "Kinfold")
        self.project: Project | None = None
        self.groups = []
        self.status = None
        self.curve = Curve()
        self.job: Job | None = None          # a long job with a progress bar (scan, relearn, first proposals)
        self.pending: Job | None = None      # the decision in flight
        self.held: list[tuple] = []          # keys typed while it is in flight
        self.last_scan = None
        self.last_preview = None
        self.last_export = None
        self.last_import = None
        self.last_rename = None
        self.last_label_menu = None
        self.relearn_seconds: float | None = None   # time budget handed to the engine (None: its default)
        self.accepted_as: dict[int, str] = {}       # group id -> the label it was accepted under here
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
        self.review_model = LazyPhotoModel(self.thumbs, self)   # a chunk of rows at a time
        self.review_page = ReviewPage(self.review_model)
        self.mistakes_page = MistakesPage(self.thumbs)
        self.browse_model = BrowseModel(self.thumbs, self)
        self.browse_page = BrowsePage(self.browse_model)
        self.browse_folders: list = []      # [(subfolder, photos)], read when the browse page opens
        self.browse_serial = 0              # the newest browse query; older answers are dropped
        self.browse_loading = False
        self.number_keys: dict[str, int] = {}   # label -> its number key (1-9), most used first
        self.stack = QStackedWidget()
        for page in (self.start, self.scan_page, self.work, self.review_page, self.mistakes_page, self.browse_page):
            self.stack.addWidget(page)
        container = QWidget()
        lay = QVBoxLayout(container)
        lay.setContentsMargins(14, 10, 14, 10)
        lay.addWidget(self.stack)
        self.setCentralWidget(container)
        self.help = HelpOverlay(container, self._help_sections())
        self._make_menus()
        backdrop_menu.install(self)          # Folder menu: Correct for backdrops…, … off

        self.start.choose_requested.connect(self.choose_folder)
        self.start.open_requested.connect(self.open_folder)
        self.group_page.label.accept_requested.connect(self.accept)
        self.group_page.grid.typed.connect(lambda t: self._typed(self.group_page.label, t))
        self.group_page.grid.opened.connect(self.preview)
        self.review_page.grid.opened.connect(self.preview)
        self.review_page.grid.typed.connect(lambda t: self._typed(self.review_page.new_label, t, focus=True))
        self.review_page.labels.currentItemChanged.connect(lambda it, _: it and self._show_review(
            it.data(Qt.ItemDataRole.UserRole)))
        # The review field's Return arrives as accept_requested (LabelField keeps Return to itself).
        self.review_page.new_label.accept_requested.connect(self.relabel_selected)
        self.review_page.relabel.clicked.connect(self.relabel_selected)
        self.review_page.remove.clicked.connect(self.remove_selected)
        self.review_page.back.connect(self.back_to_groups)
        self.side.label_chosen.connect(self.open_review)
        self.mistakes_page.confirm_requested.connect(self.confirm_mistake)
        self.mistakes_page.fix_requested.connect(self.fix_mistake)
        self.mistakes_page.back.connect(self.back_to_groups)
        self._wire_browse()
        self._wire_graph()
        self.stack.currentChanged.connect(lambda _: self._sync_actions())
        # A Ctrl key an action owns is the window's, not the field's, also while the action is unavailable
        # (Ctrl+D on a small group must not delete a letter of the label: X11 binds it to Delete).
        for field in self._label_fields():
            field.window_keys = lambda key, mods: self._shortcut(key, mods, enabled_only=False) is not None
        for lst in (self.side.labels, self.review_page.labels):   # right-click a label: Rename…
            lst.setContextMenuPolicy(Qt.ContextMenuPolicy.CustomContextMenu)
            lst.customContextMenuRequested.connect(lambda pos, w=lst: self._label_menu(w, pos))
        self.start.show_recent(self.recent_folders())
        self.start.scan_on.setText(str(self.settings.value("scan_on", "") or ""))  # dask: where scans embed
        self._sync_actions()

    # -- actions ------------------------------------------------------------------------------
    def _make_actions(self) -> dict[str, QAction]:
        spec = [  # key, text, shortcuts, section, slot
            ("accept", "Accept", ["Return", "Enter"], "Group", self.accept),
            ("toggle", "Take out / put back", ["Space"], "Group", self.toggle_member),
            ("split", "Split", ["Ctrl+D"], "Group", self.split),
            ("later", "Later", ["Ctrl+L"], "Group", self.later),
            # Not Ctrl+N: most people know it as "new"; setting aside a whole group also asks first.
            ("aside", "Set aside", ["Ctrl+Shift+A"], "Group", self.set_aside),
            ("undo", "Undo", ["Ctrl+Z"], "Group", self.undo),
            ("redo", "Redo", ["Ctrl+Shift+Z"], "Group", self.redo),
            ("keep", "Keep only these", ["Ctrl+K"], "Group", self.keep_only),
            ("preview", "Preview", ["Ctrl+P"], "Views", self.preview),
            ("review", "Review labels", ["Ctrl+R"], "Views", self.open_review),
            ("mistakes", "Find mistakes", ["Ctrl+M"], "Views", self.open_mistakes),
            ("browse", "Browse all photos", ["Ctrl+B"], "Views", self.open_browse),
            ("find", "Filter by file name", ["Ctrl+F"], "Views", self.focus_browse_name),
            ("stats", "Statistics…", ["Ctrl+Shift+S"], "Views", self.open_statistics),
            ("help", "Keys", ["F1", "?"], "Views", lambda: self.help.toggle()),
            ("open", "Open folder…", ["Ctrl+O"], "Folder", self.choose_folder),
            ("export", "Export…", ["Ctrl+E"], "Folder", self.export),
            ("import", "Import labels…", ["Ctrl+Shift+I"], "Folder", self.import_labels),
            ("rename", "Rename label…", ["F2"], "Views", self.rename_label),
            ("relearn", "Relearn", ["Ctrl+Shift+R"], "Folder", self.relearn),
            ("close", "Close folder", ["Ctrl+W"], "Folder", self.close_folder),
            ("quit", "Quit", ["Ctrl+Q"], "Folder", self.close),
        ]
        tips = {
            "accept": "Label the group (all but the taken-out photos) with the label in the field",
            "toggle": "Take the photo under the keyboard outline out of the group, or put it back",
            "split": f"Break the group into two parts that are each more alike (groups of {MIN_SPLIT} or more)",
            "later": "Leave this group; its photos come back after everything else",
            "aside": "Mark the taken-out photos — or, if none, the whole group (asks first) — as belonging "
                     "to no class",
            "undo": "Reverse the last decision (repeat to go further back)",
            "redo": "Apply again what the last undo reversed (only right after an undo)",
            "keep": "Swap in and out: the photos taken out are kept, every other one is taken out "
                    "(click the few that belong, then this)",
            "browse": "Every photo of the folder, by state, label, subfolder or file name",
            "find": "In the browse view: type part of a file name",
            "preview": "Show the photo full size with its nearest photos (or double-click it)",
            "relearn": "Relearn from the decisions so far, then propose again",
            "mistakes": "Labelled photos whose label is most likely wrong, one at a time: confirm or fix each",
            "stats": "Photos per label, labels per hour, suggestions accepted as they were, per annotator",
            "import": "Bring in labels from a CSV or COCO file, class folders or the subfolder names (checked first)",
            "rename": "Rename the label chosen in the list; an existing label's name merges the two",
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
        for title, keys in (("&Folder", ("open", "import", "export", "relearn", "close", "quit")),
                            ("&Group", ("accept", "toggle", "keep", "split", "later", "aside", "undo", "redo")),
                            ("&View", ("preview", "review", "mistakes", "browse", "find", "stats", "rename", "help"))):
            menu = bar.addMenu(title)
            for k in keys:
                menu.addAction(self.actions[k])

    def _help_sections(self):
        sections: dict[str, list] = {}
        for a in self.actions.values():
            keys = "  or  ".join(s.toString(QKeySequence.SequenceFormat.NativeText) for s in a.shortcuts())
            sections.setdefault(a.property("section"), []).append((keys, a.text()))
        return [(t, rows) for t, rows in sections.items()] + [("In the grid", GRID_KEYS),
                                                               ("Finding mistakes", MISTAKES_KEYS),
                                                               ("Preview", PREVIEW_KEYS),
                                                               ("Number keys, browsing", BROWSE_KEYS)]

    def _sync_actions(self) -> None:
        page = self.stack.currentWidget()
        idle = self.job is None and self.project is not None
        on_group = idle and page is self.work and bool(self.groups)
        for k in ("accept", "toggle", "split", "later", "aside", "preview"):
            self.actions[k].setEnabled(on_group)
        # The engine offers a split only for groups large enough to hold two parts worth confirming.
        self.actions["split"].setEnabled(on_group and self.current().splittable)
        self.actions["preview"].setEnabled(idle and page in (self.work, self.review_page))
        self.actions["undo"].setEnabled(idle and page in (self.work, self.review_page, self.mistakes_page,
                                                          self.browse_page))
        self.actions["redo"].setEnabled(self.actions["undo"].isEnabled())
        self.actions["keep"].setEnabled(on_group)
        self.actions["browse"].setEnabled(idle and page in (self.work, self.review_page))
        self.actions["find"].setEnabled(idle and page is self.browse_page)
        self.actions["preview"].setEnabled(idle and page in (self.work, self.review_page, self.browse_page))
        self.actions["review"].setEnabled(idle and page is self.work)
        self.actions["mistakes"].setEnabled(idle and page in (self.work, self.review_page))
        self.actions["export"].setEnabled(idle and page in (self.work, self.review_page))
        self.actions["relearn"].setEnabled(idle and page is self.work)
        self.actions["close"].setEnabled(self.project is not None)
        self.actions["stats"].setEnabled(idle)
        self.actions["import"].setEnabled(idle and page in (self.work, self.review_page))
        self.actions["rename"].setEnabled(idle and page in (self.work, self.review_page)
                                          and bool(self.status and self.status.by_label))
        self.actions["open"].setEnabled(self.job is None)

    def idle(self) -> bool:
        """No job and no decision in flight, no key held back."""
        return self.job is None and self.pending is None and not self.held

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
        if self.job is not None or self.pending is not None:
            self.statusBar().showMessage("wait for the running task to finish first")
            return False
        self.close_folder()
        try:
            scan = self._scan_call()  # dask: where the scan embeds (the start page's "Embed photos on")
        except ValueError as exc:
            self.start.show_error(f"Embed photos on: {exc}")
            self.stack.setCurrentWidget(self.start)
            return False
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
        self.statusBar().showMessage(self.project.folder.name)
        self.actions["relearn"].setVisible(relearning_available())
        self.scan_page.title.setText(f"Reading {self.project.folder.name}")
        self.stack.setCurrentWidget(self.scan_page)
        self._run("scan", scan(self.project), self.scan_page.progress, self._scanned)
        return True

    def _scan_call(self):
        """The scan with the start page's "Embed photos on" (saved as setting `scan_on`); ValueError if
        the text names no place to embed."""
        from core.cluster_scan import parse_target

        text = self.start.scan_on.text().strip()
        target = parse_target(text)
        self.settings.setValue("scan_on", text)
        if target is None:
            return lambda project: project.scan
        return lambda project: functools.partial(project.scan, cluster=target)

    def close_folder(self) -> None:
        """Cancel every job and wait until each has ended, however long its last step takes; only then
        is the store closed (a job never runs against a closed store)."""
        if jobs.running():
            self.statusBar().showMessage("stopping the running task…")
            QApplication.setOverrideCursor(Qt.CursorShape.WaitCursor)
            try:
                jobs.cancel_all()
                jobs.wait_all()
            finally:
                QApplication.restoreOverrideCursor()
        self.job = None
        self._end_pending()
        for dlg in (self.last_export, self.last_preview):
            if dlg is not None:
                dlg.done(0)
        self.last_export = self.last_preview = None
        self.thumbs.forget_queue()
        if self.project is not None:
            self.project.close()
            self.project = None
        self.groups = []
        self.status = None
        self.curve = Curve()
        self.accepted_as = {}
        self.group_model.set_photos([])
        self.review_model.set_photos([])
        self.mistakes_page.show_queue([])
        self.browse_model.set_photos([])
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
        note = scan_summary(report)
        self.scan_page.title.setText("Finding groups")
        self._propose_in_background(self.scan_page.progress, note, replay=True)

    def _propose_in_background(self, progress_widget, note: str, replay: bool = False,
                               then: Callable[[], None] | None = None) -> None:
        """The first proposals after a scan or a relearn build the neighbour graph, with its progress
        and a cancel (app/graph_progress.py); `note` is shown once they are on screen, then `then()`
        runs. `replay`: read the decision log once for the chart (a folder just opened). A cancel
        leaves the folder open with no groups (`_graph_stopped`)."""
        project = self.project

        def work(progress, cancel):
            return graph_progress.prepare_then(project, progress, cancel, lambda: engine_view(project, replay=replay),
                                               lambda: engine_view(project, replay=replay))

        def done(view):
            progress_widget.unit = unit
            if isinstance(view, graph_progress.Stopped):
                self._graph_stopped(view)
                return
            self.graph_stop = None
            # What is loaded by now (the engine's modules and caches, Qt's, torch's) lives as long as
            # the folder: moved out of the cyclic collector's reach, so its full passes (150-650 ms
            # holding the interpreter lock, measured by benchmarks.window_stall --profile) do not
            # freeze the window in the middle of a session. Cheap; repeated after each relearn.
            gc.freeze()
            self.group_page.busy.hide()
            self.stack.setCurrentWidget(self.work)
            if view.curve is not None:
                self.curve = view.curve
            self._apply(view)
            self.group_page.say(note)
            if then is not None:
                then()

        unit, progress_widget.unit = progress_widget.unit, "photos"
        self._start_job("finding groups", work, progress_widget, done).failed.connect(
            lambda _: setattr(progress_widget, "unit", unit))

    # -- decisions: one at a time on the engine thread; the GUI thread applies the result -------
    def _busy(self, where=None) -> bool:
        """Refuses an action while another runs (only a mouse click can get here: keys are held)."""
        if self.pending is None and self.job is None and self.project is not None:
            return False
        if self.pending is not None:
            (where or self.group_page).say("Still applying the last decision: click again once it is shown.",
                                            problem=True)
        elif self.job is not None:
            (where or self.group_page).say(f"Wait for {self.job.name} to finish first.", problem=True)
        return True

    def _act(self, name: str, call: Callable | None, done: Callable[[View], None] | None = None,
             counts: str | None = None, where=None) -> Job | None:
        """Run `call(project)` and then fetch the next view on the engine thread. `counts`: the kind of
        decision it records, for the chart (None: it records none)."""
        if self._busy(where):
            return None
        project = self.project
        review = self._review_label() if self.stack.currentWidget() is self.review_page else None
        job = self.pending = Job(name, lambda progress, cancel: engine_view(project, call, review), self)
        QApplication.instance().installEventFilter(self)

        def finished(view: View) -> None:
            if self.pending is not job:
                return  # the folder was closed meanwhile
            self._end_pending()
            if view.error is None and counts is not None:
                self.curve.add(counts, view.status.labelled)
            self._apply(view, focus_grid=call is not None)
            if view.error is not None:
                (where or self.group_page).say(view.error, problem=True)
            elif done is not None:
                done(view)
            self.job_ended.emit(name)
            self._deliver_held()

        def failed(message: str) -> None:
            if self.pending is not job:
                return
            self._end_pending()
            self.held.clear()  # the screen did not change: keys typed for what comes next are void
            (where or self.group_page).say(f"{name} failed: {message}", problem=True)
            self.job_ended.emit(name)

        job.finished.connect(finished)
        job.failed.connect(failed)
        return job.start()

    def _end_pending(self) -> None:
        if self.pending is not None:
            self.pending = None
            app = QApplication.instance()
            if app is not None:
                app.removeEventFilter(self)

    def eventFilter(self, obj, event):
        """Installed only while a decision is in flight: holds keys, refuses clicks in this window."""
        if self.pending is None or not isinstance(obj, QWidget):
            return False
        etype = event.type()
        if etype not in _KEY_EVENTS and etype not in _MOUSE_EVENTS:
            return False
        win = obj.window()
        if win is not self and not self._is_own_popup(win):
            return False  # a dialog of its own (a question, the export) is not held
        if etype == QEvent.Type.ShortcutOverride:
            event.accept()       # no shortcut fires now; the key press itself comes next and is held
            return True
        if etype == QEvent.Type.KeyPress:
            if len(self.held) < MAX_HELD_KEYS:
                self.held.append((event.key(), event.modifiers(), event.text(), event.isAutoRepeat()))
            else:
                self.group_page.say(f"Typed too far ahead: keys after the {MAX_HELD_KEYS}th were dropped.",
                                    problem=True)
            return True
        if etype == QEvent.Type.KeyRelease:
            return True
        if etype == QEvent.Type.MouseButtonPress:
            self._busy()
        return True

    def keyPressEvent(self, event):
        """A key no widget took. While the window is not active, Qt's window shortcuts do not fire: an X
        server without a window manager sends keys to the window under the pointer yet never makes it
        active. The key's action is triggered here then, as its shortcut would have been; an active
        window never gets here with a shortcut's key (Qt's shortcut map takes it first)."""
        if not self.isActiveWindow():
            action = self._shortcut(event.key(), event.modifiers())
            if action is not None:
                event.accept()
                action.trigger()
                return
        unavailable = self._shortcut(event.key(), event.modifiers(), enabled_only=False)
        if unavailable is not None and not unavailable.isEnabled():
            event.accept()
            self.statusBar().showMessage(UNAVAILABLE.get(next(k for k, a in self.actions.items() if a is unavailable),
                                                         f"{unavailable.text()} is not available here"))
            return
        super().keyPressEvent(event)

    def _label_fields(self):
        return (self.group_page.label, self.review_page.new_label, self.mistakes_page.fix, self.browse_page.new_label)

    def _is_own_popup(self, win) -> bool:
        return any(win is f.completer().popup() for f in self._label_fields())

    def _deliver_held(self) -> None:
        """Deliver the held keys as a window system does: ShortcutOverride to the focus widget (or the
        open popup), then the window's shortcut if nobody claimed the key, else the key press itself.
        Letters, arrows and Space arrive; a key that would decide (Return, or a decision's shortcut) is
        refused, since it was pressed before the group it would decide on was on screen."""
        refused = None
        while self.held:
            key, mods, text, repeat = self.held.pop(0)
            if self._decides(key, mods):
                refused = refused or QKeySequence(QKeyCombination(mods, Qt.Key(key))).toString(
                    QKeySequence.SequenceFormat.NativeText)
                continue
            target = QApplication.activePopupWidget() or QApplication.focusWidget() or self
            over = QKeyEvent(QEvent.Type.ShortcutOverride, key, mods, text, repeat)
            over.setAccepted(False)
            QApplication.sendEvent(target, over)
            if not over.isAccepted() and self._shortcut(key, mods) is not None:
                self._shortcut(key, mods).trigger()
                continue
            QApplication.sendEvent(target, QKeyEvent(QEvent.Type.KeyPress, key, mods, text, repeat))
            QApplication.sendEvent(target, QKeyEvent(QEvent.Type.KeyRelease, key, mods, text, repeat))
        if refused:
            where = self.stack.currentWidget()
            where = where if where in (self.review_page, self.mistakes_page) else self.group_page
            where.say(f"{refused} was pressed before this was on screen, so it decided nothing: "
                      "press it again to apply it here.", problem=True)

    _DECIDING = ("accept", "split", "later", "aside", "undo", "redo")

    def _decides(self, key, mods) -> bool:
        plain = mods & ~Qt.KeyboardModifier.KeypadModifier
        if key in (Qt.Key.Key_Return, Qt.Key.Key_Enter) and plain == Qt.KeyboardModifier.NoModifier:
            return True  # accept, or relabel in the review page's field
        action = self._shortcut(key, mods)
        return action is not None and any(action is self.actions[k] for k in self._DECIDING)

    def _shortcut(self, key, mods, enabled_only: bool = True) -> QAction | None:
        for m in (mods, mods & ~Qt.KeyboardModifier.KeypadModifier):  # as Qt's shortcut map tries them
            seq = QKeySequence(QKeyCombination(m, Qt.Key(key)))
            for a in self.actions.values():
                if (a.isEnabled() or not enabled_only) and a.isVisible() and any(s.matches(seq) == QKeySequence.SequenceMatch.ExactMatch
                                                           for s in a.shortcuts()):
                    return a
        return None

    def _apply(self, view: View, focus_grid: bool = False) -> None:
        """Show a view: the current group and what follows, the figures, the review page's photos."""
        self.status = view.status
        self._show_groups(view.groups, focus_grid)
        self._show_graph_missing(view.graph_missing)
        if view.review is not None:
            self._fill_review(*view.review)
        elif self.stack.currentWidget() is self.review_page and not view.status.by_label:
            self.back_to_groups()
        if self.stack.currentWidget() is self.browse_page:   # a decision may move photos in or out of view
            self.browse_page.set_choices(list(view.status.by_label), self.browse_folders)
            self._browse_query(keep=True)

    # -- the group ----------------------------------------------------------------------------
    def current(self):
        return self.groups[0] if self.groups else None

    def refresh(self) -> Job | None:
        """Ask for the proposals and status again (after something changed outside the window)."""
        return self._act("refresh", None)

    def _show_groups(self, groups, focus_grid: bool = False) -> None:
        """`focus_grid`: after a decision the keyboard goes back to the grid of the new group (the
        label field may have had it back from a closing popup meanwhile)."""
        self.groups = [shown(g) for g in groups]
        g = self.current()
        self.thumbs.forget_queue()
        self.group_model.set_photos(g.members if g else [])
        more = len(self.groups) - 1
        # LOOKAHEAD groups are asked for at a time: a full list means at least that many more follow.
        queued = more if len(self.groups) < LOOKAHEAD else f"at least {more}"
        self.group_page.show_group(g, 1, queued)
        self.group_page.label.reset((g.suggested_label or "") if g else "")
        self.side.show_state(self.status, self.groups[1:], self.curve)
        names = list(self.status.by_label)
        self.group_page.label.set_names(names)
        self.review_page.new_label.set_names(names)
        self.browse_page.new_label.set_names(names)
        self.number_keys = number_keys(self.status.by_label)
        if len(self.groups) > 1:  # so the next group appears without waiting for its thumbnails
            nxt = self.groups[1].members
            self.thumbs.prefetch(nxt, self.group_page.grid.side_for(len(nxt)))
        self._sync_actions()
        if self.stack.currentWidget() is self.work and (focus_grid or not self.group_page.label.hasFocus()):
            self.group_page.grid.setFocus()
        self.groups_shown.emit()

    @staticmethod
    def _start_label(field, text: str) -> None:
        """A letter typed on a grid starts the label: the field takes focus and the letter, as an edit
        (so completion opens as if it had been typed there)."""
        field.setFocus(Qt.FocusReason.ShortcutFocusReason)
        field.selectAll()
        field.insert(text)

    def _settle_label(self, label: str, page) -> str | None:
        """A new label that is an existing one in another spelling, or its first letters, asks once
        which is meant. Returns the label to use, or None (cancelled)."""
        names = list(self.status.by_label) if self.status else []
        close = near_duplicates(label, names)[:3]
        if not close:
            return label
        box = QMessageBox(self)
        box.setIcon(QMessageBox.Icon.Question)
        box.setWindowTitle("Existing label?")
        box.setText(f"“{label}” would be a new label. Did you mean "
                    + " or ".join(f"“{n}”" for n in close) + "?")
        box.setInformativeText("Two spellings of one name would become two classes.")
        use = [box.addButton(f"Use “{n}”", QMessageBox.ButtonRole.AcceptRole) for n in close]
        keep = box.addButton(f"Keep “{label}” as a new label", QMessageBox.ButtonRole.AcceptRole)
        cancel = box.addButton(QMessageBox.StandardButton.Cancel)
        box.setDefaultButton(use[0])
        box.setEscapeButton(cancel)
        box.exec()
        clicked = box.clickedButton()
        if clicked in use:
            return close[use.index(clicked)]
        if clicked is keep:
            return label
        page.say("Nothing labelled: choose the label again.")
        return None

    def accept(self) -> None:
        if self._busy():
            return
        g = self.current()
        page = self.group_page
        if g is None or self.stack.currentWidget() is not self.work:
            return
        label = " ".join(page.label.text().split())
        if not label:
            page.say("Type a label first (or pick one from the list as you type).", problem=True)
            page.label.setFocus()
            return
        if not self._confirm_unseen():  # photos never on screen: say how many, ask once
            return
        label = self._settle_label(label, page)
        if label is None:
            page.label.setFocus()
            return
        drop = self.group_model.taken_out()
        kept = len(g.members) - len(drop)
        page.label.close_popup()

        def done(view):
            self.accepted_as[g.id] = label   # an undo brings the group back with this label in the field
            page.say(f"Labelled {photos(kept)} “{label}”" +
                     (f"; {len(drop)} taken out went back to the pool." if drop else "."))

        page.grid.setFocus()
        self._act("accept", lambda p: p.accept(g.id, label, drop), done, counts="accept")

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
        if g is None or self._busy():
            return
        self._act("split", lambda p: p.split(g.id),
                  lambda view: self.group_page.say(
                      "Split into " + " and ".join(str(len(part.members)) for part in view.result) + " photos."),
                  counts="split")

    def later(self) -> None:
        g = self.current()
        if g is None or self._busy():
            return
        self._act("later", lambda p: p.defer(g.id), lambda view: self.group_page.say("Left for later."),
                  counts="later")  # a logged decision: the chart replayed at reopening counts it too

    def set_aside(self) -> None:
        g = self.current()
        if g is None or self._busy():
            return
        paths = self.group_model.taken_out()
        if not paths:
            answer = QMessageBox.question(
                self, "Set the whole group aside?",
                f"No photo is taken out, so all {photos(len(g.members))} of this group would be set aside "
                "as belonging to no class.", QMessageBox.StandardButton.Yes | QMessageBox.StandardButton.Cancel,
                QMessageBox.StandardButton.Cancel)
            if answer != QMessageBox.StandardButton.Yes:
                self.group_page.say("Nothing set aside.")
                return
            paths = list(g.members)
        self._act("set aside", lambda p: p.set_aside(paths),
                  lambda view: self.group_page.say(f"Set {photos(len(paths))} aside as no class."),
                  counts="set_aside")

    def undo(self) -> None:
        where = self.stack.currentWidget()
        where = where if where in (self.review_page, self.mistakes_page, self.browse_page) else self.group_page
        if self._busy(where):
            return

        def done(view):
            undone = view.result
            if where is self.mistakes_page:
                where.say(f"Undid the last {undone['kind'].replace('_', ' ')}; listing the likely mistakes again."
                          if undone else "Nothing left to undo.")
                if undone:
                    self._load_mistakes()   # what the undo gave back is ranked with the rest
            elif not undone:
                where.say("Nothing left to undo.")
            elif undone["kind"] == "split":
                # A split changes no label; what comes back is the whole group, shown first again.
                n = len(view.groups[0].members) if view.groups else 0
                where.say(f"Undid the split: the whole group ({photos(n)}) is back.")
            elif undone["kind"] == "accept" and view.groups and view.groups[0].id in self.accepted_as \
                    and where is self.group_page:
                # The group is shown again: its label goes back in the field, ready to correct and accept.
                self.group_page.label.reset(self.accepted_as[view.groups[0].id])
                where.say(f"Undid the last accept ({photos(undone['photos'])}); its label is back in the field.")
            else:
                where.say(f"Undid the last {undone['kind'].replace('_', ' ')} ({photos(undone['photos'])}).")

        self._act("undo", lambda p: p.undo(), done, counts="undo", where=where)

    def preview(self, path: str | None = None) -> None:
        if self.project is None or self._busy():
            return
        page = self.stack.currentWidget()
        grid = {self.review_page: self.review_page.grid, self.browse_page: self.browse_page.grid}.get(
            page, self.group_page.grid)
        path = path or grid.current_path()
        if not path or self._graph_first(lambda: self.preview(path)):
            return
        project = self.project

        def fetch(p, then):
            """The dialog's engine reads, on the engine thread; `then(info, near)` on the GUI thread."""
            job = Job("preview", lambda progress, cancel: (project.photo_info(p), project.neighbours_labelled(p, 8)),
                      self)
            job.finished.connect(lambda r: then(*r))
            job.failed.connect(lambda m: self.group_page.say(f"preview failed: {m}", problem=True))
            job.start()

        on_group = page is self.work
        dlg = PreviewDialog(fetch, self.thumbs, path, self, sequence=grid.photo_model().paths,
                            toggle=self._toggle_path if on_group else None,
                            is_out=(lambda q: q in self.group_model.out) if on_group else None)
        dlg.setStyleSheet(theme.STYLE)
        dlg.open()
        self.last_preview = dlg

    # -- review -------------------------------------------------------------------------------
    def open_review(self, label: str | None = None) -> None:
        if self.project is None or self._busy():
            return
        if not (self.status and self.status.by_label):
            self.group_page.say("No labels yet: accept a group first.", problem=True)
            return
        if self._graph_first(lambda: self.open_review(label)):
            return
        self.stack.setCurrentWidget(self.review_page)
        self._fill_review(label or self._side_label() or next(iter(self.status.by_label)), None)
        self.review_page.grid.setFocus()

    def _side_label(self) -> str | None:
        it = self.side.labels.currentItem()
        return it.data(Qt.ItemDataRole.UserRole) if it else None

    def _review_label(self) -> str | None:
        it = self.review_page.labels.currentItem()
        return it.data(Qt.ItemDataRole.UserRole) if it else None

    def _fill_review(self, label: str, rows: tuple | None) -> None:
        """The label list (from the last status) with `label` current, and its photos: `rows` when the
        engine already sent them, else asked for."""
        by_label = self.status.by_label if self.status else {}
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
        if rows is None:
            self._show_review(label)
        else:
            self._review_rows(label, rows)

    def _show_review(self, label: str) -> None:
        if self.project is None or self._busy(self.review_page):
            return
        # engine_view reads the review of the label current in the list (set by _fill_review), and
        # _apply shows it: the label's photos are ranked and put in the grid once, not twice.
        self._act("review", None, where=self.review_page)

    def _review_rows(self, label: str, rows) -> None:
        """`rows`: (paths, notes) from `review_lists`, shown a chunk at a time (`LazyPhotoModel`)."""
        paths, notes = rows
        self.review_model.set_photos(paths, notes)
        self.review_page.header.setText(f"“{label}”  ·  {photos(len(paths))}")
        if paths:  # the least typical photo, selected (the field is empty, so Return alone relabels nothing)
            self.review_page.grid.selectionModel().setCurrentIndex(
                self.review_model.index(0), QItemSelectionModel.SelectionFlag.ClearAndSelect)

    def relabel_selected(self) -> None:
        page = self.review_page
        if self._busy(page):
            return
        paths = page.selected_paths()
        new = " ".join(page.new_label.text().split())
        if not paths or not new:
            page.say("Select photos and type the new label first.", problem=True)
            return
        new = self._settle_label(new, page)
        if new is None:
            return
        # The field is emptied now, so a second Return cannot relabel the next photo selected.
        page.new_label.reset()
        page.grid.setFocus()
        self._act("relabel", lambda p: p.label(paths, new),
                  lambda view: page.say(f"Relabelled {photos(len(paths))} “{new}”."), counts="label", where=page)

    def remove_selected(self) -> None:
        page = self.review_page
        if self._busy(page):
            return
        paths = page.selected_paths()
        if not paths:
            page.say("Select photos first.", problem=True)
            return
        self._act("remove", lambda p: p.clear(paths),
                  lambda view: page.say(f"Removed the label from {photos(len(paths))}; back in the pool."),
                  counts="clear", where=page)

    # -- likely mistakes ------------------------------------------------------------------------
    def open_mistakes(self) -> None:
        if self.project is None or self._busy():
            return
        if not (self.status and len(self.status.by_label) >= 2):
            self.group_page.say("Finding mistakes needs photos of at least two labels.", problem=True)
            return
        if self._graph_first(self.open_mistakes):
            return
        self.stack.setCurrentWidget(self.mistakes_page)
        self.mistakes_page.fix.set_names(list(self.status.by_label))
        self._load_mistakes()

    def _load_mistakes(self) -> None:
        page = self.mistakes_page
        page.show_queue([])
        page.header.setText("Finding likely mistakes…")
        page.facts.setText("Ranking every labelled photo (a few seconds on thousands of photos).")
        self._act("mistakes", lambda p: p.likely_mistakes(MISTAKES_LIMIT),
                  lambda view: (page.show_queue(view.result),
                                page.say(f"{photos(len(view.result))} whose label is most in doubt.")),
                  where=page)

    def confirm_mistake(self, path: str) -> None:
        page = self.mistakes_page
        m = page.current()
        if m is None or m.path != path or self._busy(page):
            return
        self._act("confirm", lambda p: p.confirm([path]),
                  lambda view: (page.advance(), page.say(f"Kept “{m.label}” on {path}.")),
                  counts="confirm", where=page)

    def fix_mistake(self, path: str, label: str) -> None:
        page = self.mistakes_page
        m = page.current()
        if m is None or m.path != path or self._busy(page):
            return
        label = self._settle_label(label, page)
        if label is None:
            return
        page.setFocus()
        self._act("fix", lambda p: p.confirm([path], label),
                  lambda view: (page.advance(), page.say(f"Relabelled {path} “{label}” (was “{m.label}”).")),
                  counts="confirm", where=page)

    def back_to_groups(self) -> None:
        self.stack.setCurrentWidget(self.work)
        self.group_page.grid.setFocus()

    # -- relearn and export -------------------------------------------------------------------
    def relearn(self) -> None:
        if not relearning_available():
            self.actions["relearn"].setVisible(False)
            return
        if self._busy():
            return
        page = self.group_page
        page.busy.show()
        page.say("Relearning…")

        def done(result):
            summary = relearn_summary(result or {})
            page.say(summary + " Proposing again…")
            self._propose_in_background(page.busy, summary)

        project, seconds = self.project, self.relearn_seconds
        self._run("relearning", lambda progress, cancel: project.relearn(progress=progress, seconds=seconds,
                                                                        cancel=cancel), page.busy, done)

    # --- cli: statistics (app/stats_dialog.py) ---
    def open_statistics(self) -> None:
        if self.project is None or self._busy():
            return
        from app.stats_dialog import StatsDialog
        dlg = StatsDialog(self.project.statistics(), self)
        dlg.setStyleSheet(theme.STYLE)
        self.last_stats = dlg
        dlg.open()

    def export(self) -> None:
        if self.project is None or self._busy() or self._graph_first(self.export):
            return
        dlg = ExportDialog(self.project, self)
        dlg.setStyleSheet(theme.STYLE)
        self.last_export = dlg
        dlg.open()

    # --- import: importing labels (Ctrl+Shift+I) and renaming a label (F2) -----------------------
    def import_labels(self) -> None:
        from app.import_dialog import ImportDialog

        if self.project is None or self._busy():
            return
        dlg = ImportDialog(self.project, self, on_imported=lambda rep: self._act(
            "import", None, lambda view: self.group_page.say(f"Imported labels for {photos(rep.labelled)}."),
            counts="import"))
        dlg.setStyleSheet(theme.STYLE)
        self.last_import = dlg
        dlg.open()

    def _label_menu(self, lst, pos) -> None:
        from PySide6.QtWidgets import QMenu

        item = lst.itemAt(pos)
        if item is None:
            return
        lst.setCurrentItem(item)
        menu = QMenu(self)
        menu.addAction("Rename…", lambda: self.rename_label(item.data(Qt.ItemDataRole.UserRole)))
        self.last_label_menu = menu
        menu.popup(lst.viewport().mapToGlobal(pos))

    def rename_label(self, label: str | None = None) -> None:
        from app.import_dialog import RenameDialog

        if self.project is None or self._busy():
            return
        on_review = self.stack.currentWidget() is self.review_page
        label = label or (self._review_label() if on_review else self._side_label())
        names = list(self.status.by_label) if self.status else []
        where = self.review_page if on_review else self.group_page
        if label not in names:
            where.say("Choose a label in the list first, then F2 (or right-click it: Rename…).", problem=True)
            return

        def chosen(old: str, new: str, confirm: bool) -> None:
            def done(view):
                r = view.result
                if on_review and r.new in view.status.by_label:
                    self._fill_review(r.new, None)
                verb = "Merged" if r.merged else "Renamed"
                where.say(f"{verb} “{r.old}” into “{r.new}” ({photos(r.photos)}); Ctrl+Z undoes it."
                          if r.merged else f"{verb} “{r.old}” to “{r.new}” ({photos(r.photos)}).")
            self._act("rename", lambda p: p.rename_label(old, new, confirm=confirm), done, counts="rename",
                      where=where)

        dlg = RenameDialog(label, names, chosen, self)
        dlg.setStyleSheet(theme.STYLE)
        self.last_rename = dlg
        dlg.open()

    # --- browse: the browse page, number keys, redo, keep only these, preview steps ---------------
    def _wire_browse(self) -> None:
        # A label of thousands of photos: every card has one size, laid out in batches between events.
        for grid in (self.review_page.grid,):
            grid.setUniformItemSizes(True)
            grid.setLayoutMode(grid.LayoutMode.Batched)
            grid.setBatchSize(200)
        page = self.browse_page
        page.query_changed.connect(lambda: self._browse_query())
        page.more_wanted.connect(lambda: self._browse_query(append=True))
        page.label_requested.connect(self.browse_label)
        page.aside_requested.connect(lambda paths: self._browse_decide(
            "set aside", lambda p: p.set_aside(paths), f"Set {photos(len(paths))} aside as no class.", "set_aside"))
        page.clear_requested.connect(lambda paths: self._browse_decide(
            "remove", lambda p: p.clear(paths), f"Removed the label from {photos(len(paths))}; back in the pool.",
            "clear"))
        page.back.connect(self.back_to_groups)
        page.grid.opened.connect(self.preview)
        page.grid.typed.connect(lambda t: self._typed(page.new_label, t, focus=True))

    def open_browse(self) -> None:
        if self.project is None or self._busy():
            return
        page = self.browse_page
        self.stack.setCurrentWidget(page)
        names = list(self.status.by_label) if self.status else []
        page.set_choices(names, self.browse_folders)
        page.grid.setFocus()
        project = self.project
        job = Job("browse folders", lambda progress, cancel: project.subfolders(), self)

        def folders(found):
            self.browse_folders = found
            page.set_choices(names, found)
        job.finished.connect(folders)
        job.failed.connect(lambda m: page.say(f"listing the folders failed: {m}", problem=True))
        job.start()
        self._browse_query()

    def focus_browse_name(self) -> None:
        if self.stack.currentWidget() is self.browse_page:
            self.browse_page.focus_name()

    def _browse_query(self, append: bool = False, keep: bool = False) -> None:
        """Ask the engine for the photos matching the page's filters: the first page (`keep`: as many
        as are loaded now, after a decision), or (`append`) the next page after those loaded."""
        page, project = self.browse_page, self.project
        if project is None or (append and self.browse_loading):
            return
        filters = page.filters()
        offset = page.loaded() if append else 0
        limit = max(BROWSE_PAGE, page.loaded()) if keep else BROWSE_PAGE
        self.browse_serial += 1
        serial = self.browse_serial
        self.browse_loading = append
        job = Job("browse", lambda progress, cancel: project.browse(offset=offset, limit=limit, **filters), self)

        def shown_(found):
            if serial != self.browse_serial or self.project is not project:
                return  # a newer query was asked for meanwhile, or the folder closed
            self.browse_loading = False
            page.show_page(found, append)

        def failed(message):
            if serial == self.browse_serial:
                self.browse_loading = False
                page.say(message, problem=True)
        job.finished.connect(shown_)
        job.failed.connect(failed)
        job.start()

    def browse_label(self, paths: list, label: str) -> None:
        page = self.browse_page
        if self._busy(page):
            return
        label = self._settle_label(label, page)
        if label is None:
            return
        page.new_label.reset()
        page.grid.setFocus()
        self._browse_decide("label", lambda p: p.label(paths, label), f"Labelled {photos(len(paths))} “{label}”.",
                            "label")

    def _browse_decide(self, name: str, call, said: str, counts: str) -> None:
        page = self.browse_page
        self._act(name, call, lambda view: page.say(said), counts=counts, where=page)

    def _typed(self, field, text: str, focus: bool = False) -> None:
        """A key typed on a grid: a number key 1-9 fills the label field with the label of that number
        (the side panel shows the numbers); any other key starts typing a label. `focus`: the field
        takes the keyboard after a number key too (where Return in the field is what applies it)."""
        by_key = {k: name for name, k in self.number_keys.items()}
        if text.isdigit() and len(text) == 1 and int(text) in by_key:
            field.reset(by_key[int(text)])
            if focus:
                field.setFocus(Qt.FocusReason.ShortcutFocusReason)
            return
        self._start_label(field, text)

    def redo(self) -> None:
        where = self.stack.currentWidget()
        where = where if where in (self.review_page, self.mistakes_page, self.browse_page) else self.group_page
        if self._busy(where):
            return

        def done(view):
            redone = view.result
            where.say(f"Redid the {redone['kind'].replace('_', ' ')} ({photos(redone['photos'])}).")
            if where is self.mistakes_page:
                self._load_mistakes()

        self._act("redo", lambda p: p.redo(), done, counts="redo", where=where)

    def keep_only(self) -> None:
        """Swap the take-outs of the current group: the photos taken out are kept, the rest go out."""
        m = self.group_model
        if self.current() is None or not m.paths:
            return
        m.out = set(m.paths) - m.out
        m.dataChanged.emit(m.index(0), m.index(len(m.paths) - 1))
        m.out_changed.emit()
        kept = len(m.paths) - len(m.taken_out())
        self.group_page.say(f"Keeping only {photos(kept)}; the other {len(m.taken_out())} are taken out "
                            "(Ctrl+K again swaps back).")

    def _toggle_path(self, path: str) -> bool:
        """Space in a preview opened from the group: take the photo out or put it back."""
        m = self.group_model
        if path in m.paths:
            m.toggle(m.paths.index(path))
        return path in m.out

    # --- graphprog: the neighbour graph's build shown and cancellable (app/graph_progress.py) ---
    def _wire_graph(self) -> None:
        """A "Find groups" button for the group page's stopped state; Esc on the group page stops a
        build shown in its progress bar (the scan page's Esc already clicks its Cancel)."""
        self.graph_stop: graph_progress.Stopped | None = None   # the last build stopped, until one ends
        self.find_groups = _FindGroupsButton("Find groups")
        self.find_groups.setObjectName("primary")
        self.find_groups.setToolTip("Find the nearest photos of every photo and form the groups "
                                    "(shows its progress; Cancel or Esc stops it)")
        self.find_groups.hide()
        self.find_groups.clicked.connect(self.find_groups_again)
        self.find_groups.escaped.connect(self._escape_build)
        lay = self.group_page.layout()
        # Shown only with the empty text, which then sits at the bottom of its half, the button at the top of its own.
        lay.insertWidget(lay.indexOf(self.group_page.empty) + 1, self.find_groups, 1,
                         Qt.AlignmentFlag.AlignHCenter | Qt.AlignmentFlag.AlignTop)
        for signal in (self.group_page.grid.escaped, self.group_page.label.escaped):
            signal.connect(self._escape_build)

    def _escape_build(self) -> None:
        job = self.job
        if job is not None and job.name == "finding groups" and self.group_page.busy.isVisible():
            self.group_page.busy.cancel_button.click()

    def _graph_stopped(self, stopped: "graph_progress.Stopped") -> None:
        """A build was cancelled: the folder stays open (browse, import, statistics work), with no groups
        until "Find groups" or an action that needs the graph builds it again."""
        self.graph_stop = stopped
        self.group_page.busy.hide()
        self.stack.setCurrentWidget(self.work)
        view = stopped.view
        if view is not None:
            if view.curve is not None:
                self.curve = view.curve
            self._apply(view)
        self.group_page.say("Stopped finding neighbours.", problem=True)
        self._sync_actions()
        self.find_groups.setFocus()      # the keyboard has a place: Return or Space goes on, Esc stops again

    def _show_graph_missing(self, missing: bool) -> None:
        """The group page's state while there is no graph: what happened and the button to go on."""
        self.find_groups.setVisible(missing)
        self.group_page.empty.setAlignment(Qt.AlignmentFlag.AlignHCenter | Qt.AlignmentFlag.AlignBottom if missing
                                           else Qt.AlignmentFlag.AlignCenter)
        if not missing:
            return
        self.group_page.header.setText("No groups yet")
        self.group_page.empty.setText(
            (self.graph_stop.line() if self.graph_stop is not None else "The groups have not been formed yet.")
            + " Browsing, importing labels and the statistics work meanwhile. Find groups goes on; reviewing, "
              "finding mistakes, the preview and exporting find the neighbours first too.")

    def _graph_first(self, retry: Callable[[], None] | None) -> bool:
        """When the neighbour graph is not built (its build was stopped), build it now, shown in the
        group page's progress bar with its Cancel, then call `retry`. True when it started that."""
        if self.project is None or self.job is not None or self.project.graph_ready():
            return False
        self.stack.setCurrentWidget(self.work)
        self.group_page.busy.show()
        if not self.group_page.grid.isVisible():
            self.find_groups.setFocus()  # Esc there stops the build (the grid, hidden now, would take it else)
        self.group_page.say("Finding neighbours first…")
        self._propose_in_background(self.group_page.busy, "Groups formed.", then=retry)
        return True

    def find_groups_again(self) -> None:
        if self.project is None or self._busy():
            return
        if not self._graph_first(None):
            self.refresh()


class _FindGroupsButton(QPushButton):
    """The "Find groups" button; Esc on it (it has the keyboard while there are no groups) stops a build."""
    escaped = Signal()

    def keyPressEvent(self, event):
        if event.key() == Qt.Key.Key_Escape:
            self.escaped.emit()
            return
        super().keyPressEvent(event)
