"""The screens of the main window: start, scan, group, review. They lay widgets out and emit what
the user asked for; the window turns that into engine calls."""
from __future__ import annotations

import time

from PySide6.QtCore import QEvent, QPointF, QStringListModel, Qt, Signal
from PySide6.QtGui import QAction, QKeySequence, QMouseEvent
from PySide6.QtWidgets import (QApplication, QCompleter, QFrame, QHBoxLayout, QLabel, QLineEdit, QListWidget,
                               QListWidgetItem, QPushButton, QToolButton, QVBoxLayout, QWidget,
                               QAbstractItemView, QSizePolicy)

from app import theme
from app.jobs import JobProgress, _duration
from app.photo_grid import PhotoGrid, PhotoModel
from app.side_panel import count
from core.calibration import plain_label, plain_words


def _label(text: str = "", name: str | None = None, wrap: bool = False) -> QLabel:
    lab = QLabel(text)
    if name:
        lab.setObjectName(name)
    lab.setWordWrap(wrap)
    return lab


def action_button(action: QAction, primary: bool = False, compact: bool = False) -> QToolButton:
    """A button showing the action's name over its key, so the keyboard is learnt by using the mouse
    (`compact`: the key only in the tooltip)."""
    b = QToolButton()
    b.setDefaultAction(action)
    b.setToolButtonStyle(Qt.ToolButtonStyle.ToolButtonTextOnly)
    keys = "" if compact else action.shortcut().toString(action.shortcut().SequenceFormat.NativeText)
    b.setText(f"{action.iconText()}\n{keys}" if keys else action.iconText())
    def sync():
        b.setText(f"{action.iconText()}\n{keys}" if keys else action.iconText())
        b.setVisible(action.isVisible())

    action.changed.connect(sync)
    b.setSizePolicy(QSizePolicy.Policy.Expanding, QSizePolicy.Policy.Preferred)
    if primary:
        b.setObjectName("primary")
    return b


def say(line: QLabel, text: str, problem: bool = False) -> None:
    """A one-line message; a problem is marked by a sign and bold as well as colour."""
    line.setStyleSheet(f"color: {theme.PROBLEM}; font-weight: 600;" if problem else f"color: {theme.MUTED};")
    line.setText(("⚠  " if problem else "") + text)


class LabelField(QLineEdit):
    """The label to accept under, completing over the labels so far. Esc hands focus back.

    Return / keypad Enter emit `accept_requested`, handled here rather than by a window shortcut: the
    field claims them at ShortcutOverride, so the accept does not depend on which window (the field's,
    or the completion popup's) a window system sends the key to. With the popup open, Return first
    takes the highlighted completion (if one is highlighted), then asks to accept. The popup is closed
    whenever the field is reset or loses focus, so it never swallows the next key or click.

    A Ctrl key one of the window's actions owns is the window's (`window_keys`, set by the window), even
    where the platform binds it to an editing key of the field: on X11, Ctrl+D deletes a character,
    Ctrl+K the rest of the line, Ctrl+E goes to the end and Ctrl+Shift+A deselects, so with the keyboard
    in the field, split, keep-only, export and set-aside did nothing (found driving the real window)."""

    escaped = Signal()
    accept_requested = Signal()

    _RETURN = (Qt.Key.Key_Return, Qt.Key.Key_Enter)

    def __init__(self, parent=None):
        super().__init__(parent)
        self.window_keys = None          # callable(key, modifiers) -> bool: a key one of the window's actions owns
        self.names = QStringListModel()
        comp = QCompleter(self.names, self)
        comp.setCaseSensitivity(Qt.CaseSensitivity.CaseInsensitive)
        comp.setFilterMode(Qt.MatchFlag.MatchContains)
        self.setCompleter(comp)
        self.setClearButtonEnabled(True)
        comp.popup().installEventFilter(self)  # after the completer's own filter, so it runs first

    def eventFilter(self, obj, event):
        """A click outside the open completion list closes it and still lands where it was aimed (the
        list alone would swallow it: "type a label, click Accept" would not accept)."""
        popup = self.completer().popup()
        if obj is popup and event.type() == QEvent.Type.MouseButtonPress \
                and not popup.rect().contains(event.position().toPoint()):
            at = event.globalPosition().toPoint()
            popup.hide()
            under = QApplication.widgetAt(at)
            if under is not None:
                # The whole click: the window system sends the release to the popup's window, now hidden.
                local = QPointF(under.mapFromGlobal(at))
                for kind, buttons in ((QEvent.Type.MouseButtonPress, event.buttons()),
                                      (QEvent.Type.MouseButtonRelease, Qt.MouseButton.NoButton)):
                    QApplication.sendEvent(under, QMouseEvent(kind, local, QPointF(at), event.button(), buttons,
                                                              event.modifiers()))
            return True
        return super().eventFilter(obj, event)

    def set_names(self, names) -> None:
        names = sorted(names)
        if names != self.names.stringList():
            self.names.setStringList(names)

    def popup_open(self) -> bool:
        return self.completer().popup().isVisible()

    def close_popup(self) -> None:
        if self.popup_open():
            self.completer().popup().hide()

    def reset(self, text: str = "") -> None:
        """A new group or a finished relabel: the field shows `text` (selected) and no popup."""
        self.close_popup()
        self.setText(text)
        self.selectAll()

    def _is_return(self, event) -> bool:
        mods = event.modifiers() & ~Qt.KeyboardModifier.KeypadModifier
        return event.key() in self._RETURN and mods == Qt.KeyboardModifier.NoModifier

    def _window_key(self, event) -> bool:
        """Whether the key goes to the window instead of the field. Ctrl+Z / Ctrl+Shift+Z only with no
        typing of the field's own to undo or redo (then the window's undo or redo of the last decision:
        after "Type a label first", Ctrl+Z in the empty field undid nothing); any other Ctrl key a window
        action owns always. Keys without Ctrl (letters, Space, Return, arrows) stay the field's."""
        if event.matches(QKeySequence.StandardKey.Undo):
            return not self.isUndoAvailable()
        if event.matches(QKeySequence.StandardKey.Redo):
            return not self.isRedoAvailable()
        return bool(event.modifiers() & Qt.KeyboardModifier.ControlModifier) and self.window_keys is not None \
            and self.window_keys(event.key(), event.modifiers())

    def event(self, event):
        if event.type() == QEvent.Type.ShortcutOverride and self._is_return(event):
            event.accept()  # Return is the field's: it arrives as a key press below, never as a shortcut
            return True
        if event.type() == QEvent.Type.ShortcutOverride and self._window_key(event):
            event.ignore()  # not claimed: the window's shortcut fires
            return False
        return super().event(event)

    def keyPressEvent(self, event):
        if self._window_key(event):
            event.ignore()  # a window never made active gets it from here (MainWindow.keyPressEvent)
            return
        if self._is_return(event):
            popup = self.completer().popup()
            if popup.isVisible():
                current = popup.currentIndex()
                if current.isValid():
                    self.setText(str(current.data()))
                popup.hide()
            event.accept()
            self.accept_requested.emit()
            return
        if event.key() == Qt.Key.Key_Escape and not self.popup_open():
            self.escaped.emit()
            return
        super().keyPressEvent(event)

    def focusOutEvent(self, event):
        # The popup keeps the field's focus while it is open; any other focus change closes it.
        if event.reason() != Qt.FocusReason.PopupFocusReason:
            self.close_popup()
        super().focusOutEvent(event)


class StartPage(QWidget):
    open_requested = Signal(str)
    choose_requested = Signal()

    def __init__(self, parent=None):
        super().__init__(parent)
        self.choose = QPushButton("Choose a photo folder…")
        self.choose.setObjectName("primary")
        self.recent = QListWidget()
        self.recent.setMaximumWidth(640)
        self.error = _label(name="problem", wrap=True)
        self.error.hide()
        # Where a scan embeds the photos (setting "scan_on"): empty is this process; a number of local
        # worker processes or a Dask scheduler's tcp://host:port (core/cluster_scan.py).
        self.scan_on = QLineEdit()
        self.scan_on.setObjectName("scan_on")
        self.scan_on.setPlaceholderText("this computer  (or a number of worker processes, or tcp://host:port)")
        self.scan_on.setMaximumWidth(640)
        self.scan_on.setToolTip("Where a scan embeds the photos: leave empty for this process, give a number of "
                                "worker processes on this computer, or the address of a Dask scheduler whose "
                                "workers see the same folder")
        col = QVBoxLayout()
        col.addStretch(1)
        col.addWidget(_label("Kinfold", "title"))
        col.addWidget(_label("Turn a folder of photos into a labelled set, a group at a time.", "subtitle"))
        col.addSpacing(18)
        col.addWidget(self.choose, 0, Qt.AlignmentFlag.AlignLeft)
        col.addWidget(self.error)
        col.addSpacing(18)
        col.addWidget(_label("Embed photos on", "heading"))
        col.addWidget(self.scan_on)
        col.addSpacing(18)
        col.addWidget(_label("Recently opened", "heading"))
        col.addWidget(self.recent)
        col.addStretch(2)
        outer = QHBoxLayout(self)
        outer.addStretch(1)
        outer.addLayout(col, 3)
        outer.addStretch(1)
        self.choose.clicked.connect(self.choose_requested)
        self.recent.itemActivated.connect(lambda it: self.open_requested.emit(it.data(Qt.ItemDataRole.UserRole)))

    def show_recent(self, folders: list[str]) -> None:
        self.recent.clear()
        for f in folders:
            it = QListWidgetItem(f)
            it.setData(Qt.ItemDataRole.UserRole, f)
            self.recent.addItem(it)
        if not folders:
            it = QListWidgetItem("nothing yet — choose a folder above")
            it.setFlags(Qt.ItemFlag.NoItemFlags)
            self.recent.addItem(it)
        elif self.recent.currentRow() < 0:
            self.recent.setCurrentRow(0)

    def show_error(self, text: str | None) -> None:
        self.error.setText(f"⚠  {text}" if text else "")
        self.error.setVisible(bool(text))


class ScanProgress(JobProgress):
    """The scan's three steps, each named with its own count, so the bar starting again is explained:
    reading the new or changed files, embedding the photos not embedded yet, finding the first groups.
    The steps are told apart by the engine's progress messages ("reading files", "embedded …",
    "done: …"/"cancelled: …"); the scan job and the "finding groups" job both report here."""

    STEPS = ("Read the new and changed files", "Embed the photos (what each one looks like)",
             "Find the first groups")
    READ, EMBED, GROUPS = range(3)

    def __init__(self, parent: QWidget | None = None):
        super().__init__(parent, unit="photos")
        self.overall = _label(" ", "heading")
        self.step_lines = [_label(" ") for _ in self.STEPS]
        box = QVBoxLayout()
        box.setSpacing(2)
        box.addWidget(self.overall)
        for line in self.step_lines:
            box.addWidget(line)
        box.addSpacing(8)
        self.layout().insertLayout(0, box)
        self._reset()

    def _reset(self) -> None:
        self.step = -1
        self.stopped = False  # the scan was cancelled: a step without a report did not run
        self.results = ["", "", ""]
        self._last = (0, 0, "")
        self._enter(self.READ)

    def _enter(self, step: int) -> None:
        """Move on to `step`; a step passed without a report had nothing to do."""
        for k in range(max(self.step, 0), step):
            if not self.results[k]:
                self.results[k] = self._summary(k)
        self.step = step
        self._step_t0, self._step_done0 = time.monotonic(), None
        self._draw_steps()

    def _summary(self, k: int) -> str:
        done, total, message = self._last if self.step == k else (0, 0, "")
        if self.stopped and not total and k < self.GROUPS:
            return "not done: the scan was stopped"
        if k == self.READ:
            if not total:
                return "no new or changed files"
            return f"{count(total, 'file')} read" if done >= total else f"{done} of {count(total, 'file')} read"
        if k == self.EMBED:
            if not total:
                return "every photo was already embedded"
            # The split between embedded and unreadable is known only from the engine's closing words.
            return self._embed_result(done, total, message) or (
                f"{done} of {count(total, 'photo')} through (unreadable ones are listed when the scan ends)")
        return "done"

    def _draw_steps(self) -> None:
        self.overall.setText(f"Step {self.step + 1} of {len(self.STEPS)}")
        for k, (line, name) in enumerate(zip(self.step_lines, self.STEPS)):
            if k < self.step:
                mark, tail, weight = "✓", f" — {self.results[k]}", 400
            elif k == self.step:
                mark, tail, weight = "▶", "", 600
            else:
                mark, tail, weight = "○", "", 400
            line.setStyleSheet(f"font-weight: {weight}; color: {theme.INK if k <= self.step else theme.MUTED};")
            line.setText(f"{mark}  {k + 1}. {name}{tail}")

    def attach(self, job) -> None:
        if job.name == "scan":
            self._reset()
        elif self._job is not None and self._job.cancelled:
            self.stopped = True
        super().attach(job)
        if job.name != "scan":
            self._enter(self.GROUPS)
            self.text.setText("finding neighbours and forming groups…")

    def show_progress(self, done: int, total: int, message: str) -> None:
        if message.startswith("reading"):
            step = self.READ
        elif "embedded" in message or message.startswith(("done:", "cancelled:")):
            step = self.EMBED
        else:
            step = self.GROUPS
        if step > self.step:
            self._enter(step)
        elif step == self.GROUPS and message.split(":")[0] != self._last[2].split(":")[0]:
            self._step_done0 = None     # the graph's next phase (dividing, then finding neighbours)
        self._last = (done, total, message)
        if step == self.GROUPS and total <= 0:
            self.bar.setRange(0, 0)  # forming the groups: one call into the engine, no count to show
            self.text.setText(f"{message}…" if message else " ")
            return
        now = time.monotonic()
        if self._step_done0 is None:
            self._step_done0, self._step_t0 = done, now
        self.bar.setRange(0, max(total, 1))
        self.bar.setValue(min(done, max(total, 1)))
        what = "files read" if step == self.READ else "photos embedded"
        # Finding neighbours (app/graph_progress.py) comes with its own words and counts.
        parts = [message if step == self.GROUPS else f"{done} of {total} {what}"]
        rate = (done - self._step_done0) / max(now - self._step_t0, 1e-6)
        if rate > 0 and now - self._step_t0 > 0.5:
            parts.append(f"{rate:.1f} {'files' if step == self.READ else 'photos'}/s")
            if done < total:
                parts.append(f"about {_duration((total - done) / rate)} left in this step")
        result = self._embed_result(done, total, message)
        if result and done >= total:
            parts = [result]
        self.text.setText("  ·  ".join(parts))

    @staticmethod
    def _embed_result(done: int, total: int, message: str) -> str | None:
        """The engine's closing words for the embedding ("done: 345 embedded, 1 could not be read"),
        when they speak for the whole scan: their figures must add up to the count shown (the engine
        embeds in chunks and counts across them; words that count less are not passed off as the
        scan's)."""
        if not message.startswith(("done:", "cancelled:")):
            return None
        numbers = [int(w) for w in message.replace(",", " ").split() if w.isdigit()]
        if sum(numbers) != done or done != total and message.startswith("done:"):
            return None
        return message.split(":", 1)[1].strip() + (" (stopped early)" if message.startswith("cancelled:") else "")


def scan_summary(report) -> str:
    """The line shown once a scan has ended: what is ready, what was embedded now, what was left out."""
    ready = count(report.photos, "photo")
    if report.cancelled:
        return f"Scan stopped early: {ready} ready; open the folder again to go on."
    left_out = f"; {count(len(report.skipped), 'file')} left out, listed in the side panel" if report.skipped else ""
    return f"{ready} ready ({report.embedded} embedded now){left_out}."


class ScanPage(QWidget):
    def __init__(self, parent=None):
        super().__init__(parent)
        self.title = _label("Reading the folder", "title")
        self.detail = _label("Photos already embedded are not redone; you can cancel (Esc) and carry on later.",
                             "subtitle", wrap=True)
        self.progress = ScanProgress()
        col = QVBoxLayout()
        col.addStretch(1)
        col.addWidget(self.title)
        col.addWidget(self.detail)
        col.addSpacing(16)
        col.addWidget(self.progress)
        col.addStretch(2)
        outer = QHBoxLayout(self)
        outer.addStretch(1)
        outer.addLayout(col, 3)
        outer.addStretch(1)

    def keyPressEvent(self, event):
        if event.key() == Qt.Key.Key_Escape:
            self.progress.cancel_button.click()
            return
        super().keyPressEvent(event)


class GroupPage(QWidget):
    """The current group: header, thumbnail grid, label field and the action buttons.

    Mouse: a click on a photo takes it out of the group or puts it back (the window's "toggle" action);
    a double-click shows it full size and leaves it as it was (the double-click's first click is undone).
    Before an accept, `confirm_unseen` asks once when members have not been on screen."""

    CLICK_HINT = "Click to take it out of the group, click again to put it back · double-click: full size"

    def __init__(self, model: PhotoModel, actions: dict[str, QAction], parent=None):
        super().__init__(parent)
        self.actions = actions
        self.group = None
        model.hint = self.CLICK_HINT
        self.header = _label(" ", "groupHeader")
        self.detail = _label(" ", "muted")
        self.grid = PhotoGrid(model)
        self.grid.setAccessibleName("Photos of the current group")
        self.empty = _label("", "subtitle", wrap=True)
        self.empty.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.empty.hide()
        self.message = _label(" ", wrap=True)
        self.label = LabelField()
        self.label.setPlaceholderText("label for this group — type to start")
        self.label.setAccessibleName("Label for this group")
        self.busy = JobProgress(unit="steps")
        self.busy.hide()

        # The question asked before labelling photos that were never on screen.
        self.question = QFrame()
        self.question.setObjectName("panel")
        self.question_text = _label(" ", "problem", wrap=True)
        self.accept_anyway = QPushButton("Accept anyway  (Return)")
        self.show_unseen = QPushButton("Show them  (Esc)")
        q = QHBoxLayout(self.question)
        q.addWidget(self.question_text, 1)
        q.addWidget(self.show_unseen)
        q.addWidget(self.accept_anyway)
        self.question.hide()
        self.asking = False

        bar = QFrame()
        bar.setObjectName("panel")
        rows = QVBoxLayout(bar)
        top = QHBoxLayout()
        name = QLabel("Label")
        name.setBuddy(self.label)
        top.addWidget(name)
        top.addWidget(self.label, 1)
        top.addWidget(action_button(actions["accept"], primary=True))
        rows.addLayout(top)
        bottom = QHBoxLayout()
        for key in ("toggle", "split", "later", "aside", "undo", "preview"):
            bottom.addWidget(action_button(actions[key]), 1)
        rows.addLayout(bottom)

        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.addWidget(self.busy)
        lay.addWidget(self.header)
        lay.addWidget(self.detail)
        lay.addWidget(self.grid, 1)
        lay.addWidget(self.empty, 1)
        lay.addWidget(self.question)
        lay.addWidget(self.message)
        lay.addWidget(bar)
        self.label.escaped.connect(self._escaped)
        self.grid.escaped.connect(self._escaped)
        self.show_unseen.clicked.connect(self._escaped)
        self.accept_anyway.clicked.connect(actions["accept"].trigger)
        self._last_click = (-1, 0.0)
        self.grid.clicked.connect(self._clicked)
        self.grid.doubleClicked.connect(self._double_clicked)
        model.out_changed.connect(self._show_header)
        model.modelReset.connect(self._stop_asking)

    # -- header -------------------------------------------------------------------------------
    def show_group(self, g, position: int, queued: int) -> None:
        has = g is not None
        self.group = g
        self._stop_asking()
        self.grid.setVisible(has)
        self.empty.setVisible(not has)
        if not has:
            self.header.setText("Nothing left to propose")
            self.detail.setText(" ")
            self.empty.setText("Every photo is labelled or set aside. Review the labels, relearn, or export.")
            self.label.clear()
            return
        self._show_header()
        parts = [f"{plain_words(g.trust)} (trust {g.trust:.2f})"]
        if g.suggested_label:
            conf = f" ({plain_label(g.confidence)}, {g.confidence:.2f})" if g.confidence is not None else ""
            parts.append(f"suggested label “{g.suggested_label}”{conf}")
        parts += [g.kind, f"{queued} more {'group' if queued == 1 else 'groups'} queued" if queued
                  else "no more groups queued"]
        self.detail.setText("  ·  ".join(parts))
        self.label.setText(g.suggested_label or "")
        self.label.selectAll()

    def labelled_by_accept(self) -> int:
        """How many photos an accept would label now: the members not taken out."""
        model = self.grid.photo_model()
        return len(model.paths) - len(model.taken_out())

    def _show_header(self) -> None:
        if self.group is None:
            return
        n, k = len(self.grid.photo_model().paths), self.labelled_by_accept()
        if k == n:
            what = f"Accept will label all {count(n, 'photo')}" if n > 1 else "Accept will label its 1 photo"
        elif k == 0:
            what = f"all {count(n, 'photo')} taken out: nothing to label"
        else:
            what = f"Accept will label {k} of {count(n, 'photo')} ({n - k} taken out)"
        self.header.setText(f"Group {self.group.id}  ·  {what}")

    # -- mouse --------------------------------------------------------------------------------
    def _clicked(self, idx) -> None:
        toggle = self.actions["toggle"]
        if not idx.isValid() or not toggle.isEnabled():
            return
        self.grid.setCurrentIndex(idx)
        toggle.trigger()
        self._last_click = (idx.row(), time.monotonic())

    def _double_clicked(self, idx) -> None:
        row, at = self._last_click
        self._last_click = (-1, 0.0)
        window = QApplication.doubleClickInterval() / 1000 + 0.2
        if idx.isValid() and row == idx.row() and time.monotonic() - at <= window:
            self.grid.setCurrentIndex(idx)
            self.actions["toggle"].trigger()  # undo the double-click's first click: previewing changes nothing

    # -- photos not on screen -----------------------------------------------------------------
    def confirm_unseen(self) -> bool:
        """Whether an accept may go on. Members (not taken out) whose card has not been fully on screen
        are counted and asked about once: accept again (Return, or the button) goes on; Esc shows them.
        With no label typed it lets the accept say what is missing first."""
        unseen = self.grid.unseen_paths() if self.group is not None else []
        if not unseen or self.asking or not self.label.text().strip():
            self._stop_asking()
            return True
        self.asking = True
        n = len(unseen)
        self.question_text.setText(
            f"⚠  {count(n, 'photo')} of this group {'has' if n == 1 else 'have'} not been on screen yet. "
            f"Return accepts {'it' if n == 1 else 'them'} too; Esc shows {'it' if n == 1 else 'them'} first.")
        self.question.show()
        return False

    def _stop_asking(self) -> None:
        self.asking = False
        self.question.hide()

    def _escaped(self) -> None:
        if self.asking:
            self._stop_asking()
            self.grid.show_first_unseen()
        else:
            self.grid.setFocus()

    def say(self, text: str, problem: bool = False) -> None:
        say(self.message, text, problem)


class ReviewPage(QWidget):
    say = GroupPage.say

    """One label's photos, least typical first; relabel or remove the selected ones."""

    back = Signal()

    def __init__(self, model: PhotoModel, parent=None):
        super().__init__(parent)
        self.labels = QListWidget()
        self.labels.setMaximumWidth(260)
        self.header = _label(" ", "groupHeader")
        self.detail = _label("Least typical first: a photo that does not belong tends to come at the top. "
                             "Select photos (click, Shift/Ctrl+click, Ctrl+A), then relabel or remove.",
                             "muted", wrap=True)
        self.grid = PhotoGrid(model, notes=True, fit=False)
        self.grid.setSelectionMode(QAbstractItemView.SelectionMode.ExtendedSelection)
        model.set_side(160)
        self.message = _label(" ", wrap=True)
        self.new_label = LabelField()
        self.new_label.setPlaceholderText("new label for the selected photos")
        self.relabel = QPushButton("Relabel selected")
        self.relabel.setObjectName("primary")
        self.remove = QPushButton("Remove label")
        self.remove.setToolTip("The selected photos go back to the pool")
        self.back_button = QPushButton("Back to groups  (Esc)")
        bar = QFrame()
        bar.setObjectName("panel")
        row = QHBoxLayout(bar)
        row.addWidget(self.new_label, 2)
        row.addWidget(self.relabel)
        row.addWidget(self.remove)
        row.addStretch(1)
        row.addWidget(self.back_button)
        right = QVBoxLayout()
        right.addWidget(self.header)
        right.addWidget(self.detail)
        right.addWidget(self.grid, 1)
        right.addWidget(self.message)
        right.addWidget(bar)
        left = QVBoxLayout()
        left.addWidget(_label("Labels", "heading"))
        left.addWidget(self.labels, 1)
        lay = QHBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.addLayout(left)
        lay.addLayout(right, 1)
        self.back_button.clicked.connect(self.back)

    def selected_paths(self) -> list[str]:
        from app.photo_grid import PATH_ROLE

        rows = sorted(i.row() for i in self.grid.selectionModel().selectedIndexes())
        return [self.grid.model().index(r).data(PATH_ROLE) for r in rows]

    def keyPressEvent(self, event):
        if event.key() == Qt.Key.Key_Escape:
            self.back.emit()
            return
        super().keyPressEvent(event)
