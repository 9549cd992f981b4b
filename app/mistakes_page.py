"""The likely-mistakes page: one labelled photo at a time, large, with its label and the label the
engine would give instead. Return confirms the label, typing a label and Return fixes it, Space skips,
Esc goes back. The page only shows and asks; the window makes the engine calls (Project.likely_mistakes,
Project.confirm)."""
from __future__ import annotations

from PySide6.QtCore import Qt, Signal
from PySide6.QtWidgets import QFrame, QHBoxLayout, QLabel, QPushButton, QSizePolicy, QVBoxLayout, QWidget

from app.pages import LabelField, _label, say
from app.thumbnails import Thumbnails

PICTURE_SIDE = 900    # decode bound; the picture is scaled to fit the page

# Keys of this page (the help sheet lists them).
KEYS = [("Return", "the label is right: confirm it"),
        ("Any letter, then Return", "type the right label: fixes it"),
        ("Space", "skip this photo for now"),
        ("Esc", "back to the groups")]


class MistakesPage(QWidget):
    confirm_requested = Signal(str)        # path
    fix_requested = Signal(str, str)       # path, new label
    back = Signal()

    def __init__(self, thumbs: Thumbnails, parent=None):
        super().__init__(parent)
        self.thumbs = thumbs
        self.queue: list = []              # core.mistakes.Mistake, the current one first
        self.setFocusPolicy(Qt.FocusPolicy.StrongFocus)
        self.header = _label(" ", "groupHeader")
        self.detail = _label("Labelled photos whose label disagrees most with the label classifier and with "
                             "their nearest labelled photos, likeliest first.", "muted", wrap=True)
        self.picture = QLabel()
        self.picture.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.picture.setMinimumSize(320, 240)
        self.picture.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Ignored)
        self.facts = _label(" ", wrap=True)
        self.facts.setTextFormat(Qt.TextFormat.RichText)
        self.message = _label(" ", wrap=True)
        self.fix = LabelField()
        self.fix.setPlaceholderText("type the right label, then Return")
        self.confirm_button = QPushButton("Label is right  (Return)")
        self.confirm_button.setObjectName("primary")
        self.skip_button = QPushButton("Skip  (Space)")
        self.back_button = QPushButton("Back to groups  (Esc)")
        for b in (self.confirm_button, self.skip_button, self.back_button):
            b.setFocusPolicy(Qt.FocusPolicy.NoFocus)   # the keys stay with the page
        bar = QFrame()
        bar.setObjectName("panel")
        row = QHBoxLayout(bar)
        row.addWidget(self.fix, 2)
        row.addWidget(self.confirm_button)
        row.addWidget(self.skip_button)
        row.addStretch(1)
        row.addWidget(self.back_button)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.addWidget(self.header)
        lay.addWidget(self.detail)
        lay.addWidget(self.picture, 1)
        lay.addWidget(self.facts)
        lay.addWidget(self.message)
        lay.addWidget(bar)
        self.confirm_button.clicked.connect(self._confirm)
        self.skip_button.clicked.connect(self.skip)
        self.back_button.clicked.connect(self.back)
        self.fix.accept_requested.connect(self._fixed)
        self.fix.escaped.connect(self.setFocus)
        thumbs.ready.connect(self._arrived)

    # -- what is shown ------------------------------------------------------------------------
    def current(self):
        return self.queue[0] if self.queue else None

    def show_queue(self, queue) -> None:
        self.queue = list(queue)
        self._show()

    def advance(self) -> None:
        """The current photo is done (confirmed, fixed or skipped): the next one."""
        if self.queue:
            self.queue.pop(0)
        self._show()

    def skip(self) -> None:
        if self.current() is not None:
            self.say(f"Skipped {self.current().path}.")
        self.advance()

    def _show(self) -> None:
        m = self.current()
        self.fix.reset()
        if m is None:
            self.header.setText("No likely mistakes left")
            self.facts.setText("Every photo listed has been looked at. Relearning or more labels can list new "
                               "ones; Esc goes back to the groups.")
            self.picture.clear()
            self.confirm_button.setEnabled(False)
            self.skip_button.setEnabled(False)
        else:
            self.header.setText(f"{m.path}  ·  {len(self.queue)} to look at")
            other = f"if not, most likely “{_esc(m.suggested)}”" if m.suggested else "no other label in sight"
            self.facts.setText(f"Labelled <b>“{_esc(m.label)}”</b> · {other} · doubt {m.score:.2f} "
                               "(0: none, 1: certainly wrong)")
            self.fix.setPlaceholderText(f"type the right label{f' (e.g. {m.suggested})' if m.suggested else ''}, "
                                        "then Return")
            self.confirm_button.setEnabled(True)
            self.skip_button.setEnabled(True)
            if len(self.queue) > 1:   # the next photo decodes while this one is looked at
                self.thumbs.request(self.queue[1].path, PICTURE_SIDE, priority=0)
            self._paint()
        if self.isVisible():
            self.setFocus()

    def _paint(self) -> None:
        m = self.current()
        if m is None:
            return
        pm = self.thumbs.pixmap(m.path, PICTURE_SIDE)
        if pm is None:
            self.picture.setText("cannot show this photo" if m.path in self.thumbs.unreadable else "…")
            return
        self.picture.setPixmap(pm.scaled(self.picture.size(), Qt.AspectRatioMode.KeepAspectRatio,
                                         Qt.TransformationMode.SmoothTransformation))

    def _arrived(self, rel: str) -> None:
        if self.current() is not None and rel == self.current().path:
            self._paint()

    def resizeEvent(self, event):
        super().resizeEvent(event)
        self._paint()

    def say(self, text: str, problem: bool = False) -> None:
        say(self.message, text, problem)

    # -- keys ---------------------------------------------------------------------------------
    def _confirm(self) -> None:
        if self.current() is not None:
            self.confirm_requested.emit(self.current().path)

    def _fixed(self) -> None:
        """Return in the field: a label typed fixes the photo; an empty field confirms it as it is."""
        text = " ".join(self.fix.text().split())
        if self.current() is None:
            return
        if text:
            self.fix_requested.emit(self.current().path, text)
        else:
            self._confirm()

    def keyPressEvent(self, event):
        key, text = event.key(), event.text()
        plain = (event.modifiers() & ~Qt.KeyboardModifier.KeypadModifier) == Qt.KeyboardModifier.NoModifier
        if key in (Qt.Key.Key_Return, Qt.Key.Key_Enter) and plain:
            self._confirm()
        elif key == Qt.Key.Key_Space and plain:
            self.skip()
        elif key == Qt.Key.Key_Escape:
            self.back.emit()
        elif text and text.isprintable() and not text.isspace() and self.current() is not None \
                and not event.modifiers() & (Qt.KeyboardModifier.ControlModifier | Qt.KeyboardModifier.AltModifier):
            # A letter starts the right label, as on the grid.
            self.fix.setFocus(Qt.FocusReason.ShortcutFocusReason)
            self.fix.selectAll()
            self.fix.insert(text)
        else:
            super().keyPressEvent(event)
            return
        event.accept()


def _esc(text: str) -> str:
    return text.replace("&", "&amp;").replace("<", "&lt;").replace(">", "&gt;")
