"""The browse page (Ctrl+B): every photo of the folder, filtered by state, label, subfolder and file
name, a page at a time; the selected photos can be labelled, relabelled, set aside or cleared.

The page only shows and asks: the window runs `Project.browse` on the engine thread (`query` says
what to ask for) and the decisions through its usual path (`label_requested`, `aside_requested`,
`clear_requested`). Each card shows the photo's path (its subfolder first) and its state or label.
"""
from __future__ import annotations

from PySide6.QtCore import QModelIndex, Qt, QTimer, Signal
from PySide6.QtWidgets import (QAbstractItemView, QComboBox, QFrame, QHBoxLayout, QLineEdit, QPushButton,
                               QVBoxLayout, QWidget)

from app.pages import GroupPage, LabelField, _label
from app.photo_grid import PATH_ROLE, PhotoGrid, PhotoModel

PAGE = 600            # photos asked for at a time; the next page when the grid is scrolled near its end
NAME_DELAY_MS = 200   # the name filter waits this long after the last key before asking
STATE_CHOICES = [("All photos", None), ("Not labelled", "unlabelled"), ("Labelled", "labelled"),
                 ("Set aside", "aside")]

KEYS = [("1 … 9", "the label of that number, in the field"),
        ("Return in its field", "browse: label the selected photos")]


def note(state: str, label, path: str = "") -> str:
    """The card's second line: the photo's label or state, then its subfolder (the first line, the
    path, elides the folder on a narrow card)."""
    what = f"“{label}”" if state == "labelled" else ("set aside" if state == "aside" else "no label")
    folder = path.rpartition("/")[0]
    return f"{what} · {folder}/" if folder else what


class BrowseModel(PhotoModel):
    """A PhotoModel that grows a page at a time (rows appended, the view keeps its place)."""

    def append_photos(self, paths, notes) -> None:
        if not paths:
            return
        first = len(self.paths)
        self.beginInsertRows(QModelIndex(), first, first + len(paths) - 1)
        self.paths.extend(paths)
        self.notes.extend(notes)
        for i, p in enumerate(paths, first):
            self._rows.setdefault(p, []).append(i)
        self.endInsertRows()


class BrowsePage(QWidget):
    say = GroupPage.say

    query_changed = Signal()                 # a filter changed: ask again from the first photo
    more_wanted = Signal()                   # the grid reached the end of what is loaded
    label_requested = Signal(list, str)      # paths, label
    aside_requested = Signal(list)
    clear_requested = Signal(list)
    back = Signal()

    def __init__(self, model: BrowseModel, parent=None):
        super().__init__(parent)
        self.model = model
        self.total = 0
        self.state = QComboBox()
        for text, value in STATE_CHOICES:
            self.state.addItem(text, value)
        self.label_filter = QComboBox()
        self.label_filter.setMinimumWidth(160)
        self.folder = QComboBox()
        self.folder.setMinimumWidth(160)
        self.name = QLineEdit()
        self.name.setPlaceholderText("file name contains…  (Ctrl+F)")
        self.name.setClearButtonEnabled(True)
        self.header = _label(" ", "groupHeader")
        self.grid = PhotoGrid(model, notes=True, fit=False)
        self.grid.setSelectionMode(QAbstractItemView.SelectionMode.ExtendedSelection)
        self.grid.setUniformItemSizes(True)
        self.grid.setLayoutMode(PhotoGrid.LayoutMode.Batched)
        self.grid.setBatchSize(200)
        self.grid.setAccessibleName("Photos matching the filters")
        model.set_side(160)
        self.message = _label(" ", wrap=True)
        self.new_label = LabelField()
        self.new_label.setPlaceholderText("label for the selected photos")
        self.apply = QPushButton("Label selected")
        self.apply.setObjectName("primary")
        self.aside = QPushButton("Set aside")
        self.aside.setToolTip("The selected photos belong to no class")
        self.clear = QPushButton("Remove label")
        self.clear.setToolTip("The selected photos go back to the pool")
        self.back_button = QPushButton("Back to groups  (Esc)")

        filters = QHBoxLayout()
        for text, w in (("Show", self.state), ("label", self.label_filter), ("in", self.folder)):
            filters.addWidget(_label(text, "muted"))
            filters.addWidget(w)
        filters.addWidget(self.name, 1)
        bar = QFrame()
        bar.setObjectName("panel")
        row = QHBoxLayout(bar)
        row.addWidget(self.new_label, 2)
        for b in (self.apply, self.aside, self.clear):
            row.addWidget(b)
        row.addStretch(1)
        row.addWidget(self.back_button)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.addLayout(filters)
        lay.addWidget(self.header)
        lay.addWidget(self.grid, 1)
        lay.addWidget(self.message)
        lay.addWidget(bar)

        self._name_timer = QTimer(self)
        self._name_timer.setSingleShot(True)
        self._name_timer.setInterval(NAME_DELAY_MS)
        self._name_timer.timeout.connect(self.query_changed)
        self.name.textChanged.connect(lambda _: self._name_timer.start())
        self.name.returnPressed.connect(self._name_now)
        for box in (self.state, self.label_filter, self.folder):
            box.currentIndexChanged.connect(lambda _: self.query_changed.emit())
        self.grid.verticalScrollBar().valueChanged.connect(self._scrolled)
        self.new_label.accept_requested.connect(self._label_selected)
        self.apply.clicked.connect(self._label_selected)
        self.aside.clicked.connect(lambda: self._with_selection(self.aside_requested.emit))
        self.clear.clicked.connect(lambda: self._with_selection(self.clear_requested.emit))
        self.back_button.clicked.connect(self.back)
        self.name.installEventFilter(self)
        self.new_label.escaped.connect(self.grid.setFocus)

    # -- filters ------------------------------------------------------------------------------
    def filters(self) -> dict:
        """What to ask `Project.browse` for."""
        label = self.label_filter.currentData()
        folder = self.folder.currentData()
        return dict(state=self.state.currentData(), label=label, subfolder=folder,
                    name=self.name.text().strip() or None)

    def set_choices(self, labels, folders) -> None:
        """The label and subfolder lists (`folders`: [(folder, photos)]); the current choices stay
        when they still exist. Sends no query."""
        for box, items in ((self.label_filter, [("any label", None)] + [(n, n) for n in labels]),
                           (self.folder, [("every folder", None)] + [
                               (f"{f or '(top folder)'}  ({n})", f or ".") for f, n in folders])):
            keep = box.currentData()
            box.blockSignals(True)
            box.clear()
            for text, value in items:
                box.addItem(text, value)
            i = box.findData(keep)
            box.setCurrentIndex(max(i, 0))
            box.blockSignals(False)

    def focus_name(self) -> None:
        self.name.setFocus(Qt.FocusReason.ShortcutFocusReason)
        self.name.selectAll()

    def _name_now(self) -> None:
        self._name_timer.stop()
        self.query_changed.emit()
        self.grid.setFocus()

    def eventFilter(self, obj, event):
        if obj is self.name and event.type() == event.Type.KeyPress and event.key() == Qt.Key.Key_Escape:
            self.grid.setFocus()
            return True
        return super().eventFilter(obj, event)

    # -- results ------------------------------------------------------------------------------
    def show_page(self, found, append: bool) -> None:
        """`found`: a `core.browse.Browsed`; appended to what is shown, or replacing it."""
        paths = [b.path for b in found.photos]
        notes = [note(b.state, b.label, b.path) for b in found.photos]
        self.total = found.total
        if append:
            self.model.append_photos(paths, notes)
        else:
            selected = set(self.selected_paths())
            current = self.grid.current_path()
            self.model.set_photos(paths, notes)
            sel = self.grid.selectionModel()
            for r, p in enumerate(paths):
                if p in selected:
                    sel.select(self.model.index(r), sel.SelectionFlag.Select)
            if current in paths:
                sel.setCurrentIndex(self.model.index(paths.index(current)), sel.SelectionFlag.NoUpdate)
        shown = len(self.model.paths)
        more = f"  ·  {shown} loaded, scroll for more" if shown < self.total else ""
        self.header.setText(f"{self.total} {'photo' if self.total == 1 else 'photos'}{more}")

    def loaded(self) -> int:
        return len(self.model.paths)

    def _scrolled(self, value: int) -> None:
        bar = self.grid.verticalScrollBar()
        if self.loaded() < self.total and value >= bar.maximum() - bar.pageStep():
            self.more_wanted.emit()

    # -- decisions ----------------------------------------------------------------------------
    def selected_paths(self) -> list[str]:
        rows = sorted(i.row() for i in self.grid.selectionModel().selectedIndexes())
        return [self.model.index(r).data(PATH_ROLE) for r in rows]

    def _with_selection(self, emit) -> None:
        paths = self.selected_paths()
        if not paths:
            self.say("Select photos first (click, Shift/Ctrl+click, Ctrl+A).", problem=True)
            return
        emit(paths)

    def _label_selected(self) -> None:
        paths = self.selected_paths()
        label = " ".join(self.new_label.text().split())
        if not paths or not label:
            self.say("Select photos and type the label first.", problem=True)
            return
        self.label_requested.emit(paths, label)

    def keyPressEvent(self, event):
        if event.key() == Qt.Key.Key_Escape:
            self.back.emit()
            return
        super().keyPressEvent(event)
