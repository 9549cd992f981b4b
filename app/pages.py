"""The screens of the main window: start, scan, group, review. They lay widgets out and emit what
the user asked for; the window turns that into engine calls."""
from __future__ import annotations

from PySide6.QtCore import QEvent, QPointF, QStringListModel, Qt, Signal
from PySide6.QtGui import QAction, QMouseEvent
from PySide6.QtWidgets import (QApplication, QCompleter, QFrame, QHBoxLayout, QLabel, QLineEdit, QListWidget,
                               QListWidgetItem, QPushButton, QToolButton, QVBoxLayout, QWidget,
                               QAbstractItemView, QSizePolicy)

from app import theme
from app.jobs import JobProgress
from app.photo_grid import PhotoGrid, PhotoModel
from app.side_panel import group_summary


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
    whenever the field is reset or loses focus, so it never swallows the next key or click."""

    escaped = Signal()
    accept_requested = Signal()

    _RETURN = (Qt.Key.Key_Return, Qt.Key.Key_Enter)

    def __init__(self, parent=None):
        super().__init__(parent)
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

    def event(self, event):
        if event.type() == QEvent.Type.ShortcutOverride and self._is_return(event):
            event.accept()  # Return is the field's: it arrives as a key press below, never as a shortcut
            return True
        return super().event(event)

    def keyPressEvent(self, event):
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
        col = QVBoxLayout()
        col.addStretch(1)
        col.addWidget(_label("Kinfold", "title"))
        col.addWidget(_label("Turn a folder of photos into a labelled set, a group at a time.", "subtitle"))
        col.addSpacing(18)
        col.addWidget(self.choose, 0, Qt.AlignmentFlag.AlignLeft)
        col.addWidget(self.error)
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


class ScanPage(QWidget):
    def __init__(self, parent=None):
        super().__init__(parent)
        self.title = _label("Reading the folder", "title")
        self.detail = _label("Photos already embedded are not redone; you can cancel and carry on later.",
                             "subtitle", wrap=True)
        self.progress = JobProgress(unit="photos")
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
    """The current group: header, thumbnail grid, label field and the action buttons."""

    def __init__(self, model: PhotoModel, actions: dict[str, QAction], parent=None):
        super().__init__(parent)
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
        lay.addWidget(self.message)
        lay.addWidget(bar)
        self.label.escaped.connect(self.grid.setFocus)

    def show_group(self, g, position: int, queued: int) -> None:
        has = g is not None
        self.grid.setVisible(has)
        self.empty.setVisible(not has)
        if not has:
            self.header.setText("Nothing left to propose")
            self.detail.setText(" ")
            self.empty.setText("Every photo is labelled or set aside. Review the labels, relearn, or export.")
            self.label.clear()
            return
        self.header.setText(f"Group {g.id}  ·  {len(g.members)} photos")
        parts = [f"trust {g.trust:.2f}"]
        if g.suggested_label:
            conf = f" (confidence {g.confidence:.2f})" if g.confidence is not None else ""
            parts.append(f"suggested label “{g.suggested_label}”{conf}")
        parts += [g.kind, f"{queued} more groups queued"]
        self.detail.setText("  ·  ".join(parts))
        self.label.setText(g.suggested_label or "")
        self.label.selectAll()

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
        self.new_label.returnPressed.connect(self.relabel.click)

    def selected_paths(self) -> list[str]:
        from app.photo_grid import PATH_ROLE

        rows = sorted(i.row() for i in self.grid.selectionModel().selectedIndexes())
        return [self.grid.model().index(r).data(PATH_ROLE) for r in rows]

    def keyPressEvent(self, event):
        if event.key() == Qt.Key.Key_Escape:
            self.back.emit()
            return
        super().keyPressEvent(event)
