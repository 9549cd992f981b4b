"""The side panel: progress strip and chart, what comes next, the labels so far, skipped files."""
from __future__ import annotations

from pathlib import PurePosixPath

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import QHBoxLayout, QLabel, QListWidget, QListWidgetItem, QProgressBar, QVBoxLayout, QWidget

from app.chart import LabelledChart
from core.label_names import number_keys


def _heading(text: str) -> QLabel:
    lab = QLabel(text)
    lab.setObjectName("heading")
    return lab


def count(n: int, word: str, plural: str | None = None) -> str:
    """'1 photo', '2 photos': the one plural rule of the window's words."""
    return f"{n} {word if n == 1 else (plural or word + 's')}"


def photos(n: int) -> str:
    return count(n, "photo")


def group_summary(g) -> str:
    """One line of the "Next up" list; `g` as the window shows it (see main_window.shown)."""
    text = f"{photos(len(g.members))} · trust {g.trust:.2f}"
    if g.suggested_label:
        text += f" · “{g.suggested_label}”?"
    if g.kind == "split part":
        text += " · split part"
    return text


class SidePanel(QWidget):
    label_chosen = Signal(str)   # a label double-clicked or Enter pressed: review it

    def __init__(self, parent=None):
        super().__init__(parent)
        self.summary = QLabel(" ")
        self.summary.setWordWrap(True)
        self.bar = QProgressBar()
        self.bar.setFormat("%p % labelled")
        self.chart = LabelledChart()
        self.next_list = QListWidget()
        self.next_list.setFocusPolicy(Qt.FocusPolicy.NoFocus)
        self.next_list.setMaximumHeight(128)
        self.labels = QListWidget()
        self.labels.setToolTip("Double-click a label (or Enter) to review its photos")
        self.skipped_heading = _heading("Skipped files")
        self.skipped = QListWidget()
        self.skipped.setMaximumHeight(72)
        self.skipped.setWordWrap(True)
        self.skipped.setHorizontalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.addWidget(_heading("Progress"))
        lay.addWidget(self.summary)
        lay.addWidget(self.bar)
        lay.addWidget(self.chart)
        self.buttons = QHBoxLayout()
        lay.addLayout(self.buttons)
        lay.addWidget(_heading("Next up"))
        lay.addWidget(self.next_list)
        lay.addWidget(_heading("Labels so far"))
        lay.addWidget(self.labels, 1)
        lay.addWidget(self.skipped_heading)
        lay.addWidget(self.skipped)
        self.labels.itemActivated.connect(lambda it: self.label_chosen.emit(it.data(Qt.ItemDataRole.UserRole)))

    def show_state(self, status, upcoming, curve) -> None:
        """`curve`: the window's `history.Curve`; its actions are the decisions recorded, undo not counted."""
        self.summary.setText(f"<b>{status.labelled}</b> of {photos(status.photos)} labelled<br>"
                             f"{status.set_aside} set aside · {status.unlabelled} to go · "
                             f"<b>{curve.actions}</b> {'action' if curve.actions == 1 else 'actions'}")
        self.summary.setToolTip("Actions: decisions recorded (accept, split, set aside, relabel, remove); "
                                "an undo is not counted, and takes the figures back.")
        self.bar.setRange(0, max(status.photos, 1))
        self.bar.setValue(status.labelled)
        self.chart.set_points(curve.points, status.photos)
        self.next_list.clear()
        for g in upcoming:
            self.next_list.addItem(group_summary(g))
        if not upcoming:
            self.next_list.addItem("nothing after this group")
        current = self.labels.currentItem().data(Qt.ItemDataRole.UserRole) if self.labels.currentItem() else None
        self.labels.clear()
        keys = number_keys(status.by_label)     # the most used labels' number keys, shown beside them
        # One tooltip for the list: a per-item setToolTip gains a reference to None on every call
        # under PySide6 6.11 (tests/test_binding_leaks.py, probe "SidePanel.show_state").
        self.labels.setToolTip("A number key pressed on the photos puts the label shown beside it in the label "
                               "field" if keys else "")
        for name, count in status.by_label.items():
            it = QListWidgetItem(f"{keys[name]}   {name}  —  {count}" if name in keys else f"     {name}  —  {count}")
            it.setData(Qt.ItemDataRole.UserRole, name)
            self.labels.addItem(it)
            if name == current:
                self.labels.setCurrentItem(it)
        if not status.by_label:
            it = QListWidgetItem("no labels yet")
            it.setFlags(Qt.ItemFlag.NoItemFlags)
            self.labels.addItem(it)

    def show_skipped(self, skipped: list[tuple[str, str]]) -> None:
        self.skipped.clear()
        for path, reason in skipped:
            # Decoder reasons end with the photo's full path; the list shows the relative one already.
            short = reason.rsplit(": ", 1)[0] if reason.endswith(PurePosixPath(path).name) and ": " in reason else reason
            it = QListWidgetItem(f"{path}: {short}")
            it.setToolTip(reason)
            self.skipped.addItem(it)
        self.skipped_heading.setText(f"Skipped files ({len(skipped)})")
        self.skipped_heading.setVisible(bool(skipped))
        self.skipped.setVisible(bool(skipped))
