"""Full-size preview of one photo: the picture (fit or zoomed, panned), its file name, size and label,
and a strip of its nearest photos, each with its label.

Keys (the dialog's own; `KEYS` lists them for the key sheet):
Z toggles fit / 100 % (one photo pixel per screen pixel), + and - zoom in and out, the arrow keys pan
(a drag with the mouse too), PgUp / PgDn step to the previous / next photo of the list it was opened
from (the group, the review or the browse list), Space takes the shown photo out of the group (or puts
it back) when the preview was opened from the group, Esc closes.
"""
from __future__ import annotations

from PySide6.QtCore import QPointF, QRectF, Qt
from PySide6.QtGui import QColor, QPainter
from PySide6.QtWidgets import QDialog, QLabel, QSizePolicy, QVBoxLayout, QWidget

from app import theme
from app.photo_grid import PhotoGrid, PhotoModel, box_height
from app.thumbnails import Thumbnails

PREVIEW_SIDE = 1400   # decode bound while the photo is shown fitted; zooming past it decodes it whole
ZOOM_STEP = 1.25
MAX_ZOOM = 8.0        # screen pixels per photo pixel
PAN_STEP = 80         # screen pixels an arrow key moves the photo
NEAR_SIDE = 136      # neighbour cards: wide enough for the similarity and most of a label

KEYS = [("Z", "fit the window / 100 %"),
        ("+  −", "zoom in / out"),
        ("Arrows, drag", "move the zoomed photo"),
        ("PgUp  PgDn", "previous / next photo"),
        ("Space", "take out of the group / put back"),
        ("Esc", "close the preview")]


class ZoomView(QWidget):
    """The photo, fitted or at a zoom factor (screen pixels per photo pixel), panned by `offset`
    (screen pixels of the photo's centre from the view's centre)."""

    def __init__(self, parent=None):
        super().__init__(parent)
        self.source = None            # the best pixmap at hand (a decode of the photo, maybe reduced)
        self.photo_size = None        # (width, height) of the photo itself, once known
        self.zoom: float | None = None   # None: fit the view
        self.offset = QPointF(0, 0)
        self.placeholder = "…"
        self._drag = None
        self.setMinimumSize(320, 240)
        self.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Ignored)
        self.setFocusPolicy(Qt.FocusPolicy.StrongFocus)
        self.setCursor(Qt.CursorShape.OpenHandCursor)

    def pixmap(self):
        return self.source

    def _photo_wh(self) -> tuple[float, float]:
        if self.photo_size:
            return self.photo_size
        return (self.source.width(), self.source.height()) if self.source is not None else (1, 1)

    def fit_zoom(self) -> float:
        w, h = self._photo_wh()
        return min(self.width() / w, self.height() / h)

    def shown_zoom(self) -> float:
        return self.fit_zoom() if self.zoom is None else self.zoom

    def set_zoom(self, zoom: float | None) -> None:
        self.zoom = None if zoom is None else max(min(zoom, MAX_ZOOM), min(self.fit_zoom(), 1.0) / 4)
        if self.zoom is None:
            self.offset = QPointF(0, 0)
        self._clamp()
        self.update()

    def pan(self, dx: float, dy: float) -> None:
        self.offset += QPointF(dx, dy)
        self._clamp()
        self.update()

    def _clamp(self) -> None:
        """The photo may not be pushed further than its edge meeting the view's centre line."""
        w, h = self._photo_wh()
        z = self.shown_zoom()
        lim_x, lim_y = max(0.0, (w * z - self.width()) / 2), max(0.0, (h * z - self.height()) / 2)
        self.offset = QPointF(max(-lim_x, min(lim_x, self.offset.x())), max(-lim_y, min(lim_y, self.offset.y())))

    def target(self) -> QRectF:
        w, h = self._photo_wh()
        z = self.shown_zoom()
        r = QRectF(0, 0, w * z, h * z)
        r.moveCenter(QPointF(self.width() / 2, self.height() / 2) + self.offset)
        return r

    def paintEvent(self, event):
        p = QPainter(self)
        if self.source is None:
            p.setPen(QColor(theme.MUTED))
            p.drawText(self.rect(), Qt.AlignmentFlag.AlignCenter, self.placeholder)
            return
        p.setRenderHint(QPainter.RenderHint.SmoothPixmapTransform, self.shown_zoom() < 1.0)
        p.drawPixmap(self.target(), self.source, QRectF(self.source.rect()))

    def resizeEvent(self, event):
        super().resizeEvent(event)
        self._clamp()

    def mousePressEvent(self, event):
        if event.button() == Qt.MouseButton.LeftButton:
            self._drag = event.position()
            self.setCursor(Qt.CursorShape.ClosedHandCursor)
        super().mousePressEvent(event)

    def mouseMoveEvent(self, event):
        if self._drag is not None:
            d = event.position() - self._drag
            self._drag = event.position()
            self.pan(d.x(), d.y())

    def mouseReleaseEvent(self, event):
        self._drag = None
        self.setCursor(Qt.CursorShape.OpenHandCursor)


class PreviewDialog(QDialog):
    """`fetch(path, then)` reads the photo's facts and nearest photos from the engine (on its thread) and
    calls `then(info, near)` on the GUI thread; `near`: [(path, similarity, state, label)].
    `sequence`: the photos PgUp/PgDn step through (the list the preview was opened from).
    `toggle(path) -> bool | None`: take the photo out of the group or put it back (returns whether it
    is out now); None when the preview was not opened from a group."""

    def __init__(self, fetch, thumbs: Thumbnails, path: str, parent=None, *, sequence=None, toggle=None,
                 is_out=None):
        super().__init__(parent)
        self.fetch, self.thumbs = fetch, thumbs
        self.sequence = list(sequence or [])
        self.toggle_out, self.is_out = toggle, is_out
        self.setWindowTitle("Photo")
        self.resize(1000, 760)
        self.picture = ZoomView()
        self.info = QLabel()
        self.info.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.info.setWordWrap(True)
        self.note = QLabel(" ")
        self.note.setObjectName("muted")
        self.near_model = PhotoModel(thumbs, self)
        self.near = PhotoGrid(self.near_model, notes=True, fit=False)
        self.near.setFocusPolicy(Qt.FocusPolicy.NoFocus)   # the keys are the picture's
        self.near_model.set_side(NEAR_SIDE)
        self.near.setFlow(PhotoGrid.Flow.LeftToRight)
        self.near.setWrapping(False)
        self.near.setVerticalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        self.near.setFixedHeight(box_height(NEAR_SIDE) + 2 * 6 + 2 * (self.near.fontMetrics().height() + 2) + 34)
        heading = QLabel("Nearest photos, with their labels (double-click to show one)")
        heading.setObjectName("heading")
        lay = QVBoxLayout(self)
        lay.addWidget(self.picture, 1)
        lay.addWidget(self.info)
        lay.addWidget(self.note)
        lay.addWidget(heading)
        lay.addWidget(self.near)
        self.near.opened.connect(self.show_photo)
        thumbs.ready.connect(self._arrived)
        self.path = None
        self.near_rows: list = []
        self.show_photo(path)
        self.picture.setFocus()

    # -- which photo --------------------------------------------------------------------------
    def show_photo(self, path: str) -> None:
        self.path = path
        self.photo_width = 0
        self.info_text = path
        self.info.setText(path)
        self.picture.photo_size = None
        self.picture.source = None
        self.picture.set_zoom(None)
        self._paint()
        self._say_position()
        self.fetch(path, lambda info, near: self._show_info(path, info, near))

    def step(self, delta: int) -> bool:
        """PgUp/PgDn: the previous/next photo of the list; False at either end (nothing changes)."""
        if self.path not in self.sequence:
            return False
        i = self.sequence.index(self.path) + delta
        if not 0 <= i < len(self.sequence):
            self.note.setText("first photo of the list" if i < 0 else "last photo of the list")
            return False
        self.show_photo(self.sequence[i])
        return True

    def _say_position(self, extra: str = "") -> None:
        parts = []
        if self.path in self.sequence:
            parts.append(f"photo {self.sequence.index(self.path) + 1} of {len(self.sequence)} (PgUp/PgDn)")
        if self.is_out is not None and self.path in self.sequence:
            parts.append("taken out of the group (Space puts it back)" if self.is_out(self.path)
                         else "in the group (Space takes it out)")
        if extra:
            parts.append(extra)
        self.note.setText("  ·  ".join(parts) or " ")

    def _show_info(self, path: str, info: dict, near) -> None:
        if path != self.path:
            return  # another photo was asked for meanwhile
        state = {"labelled": f"labelled “{info['label']}”", "set_aside": "set aside (no class)",
                 "unlabelled": "not labelled yet"}.get(info["state"], info["state"])
        self.info_text = (f"<b>{info['path']}</b><br>{info['width']} × {info['height']} px · "
                          f"{info['bytes'] / 1024:.0f} KB · {state}")
        self.photo_width = info["width"]
        self.picture.photo_size = (info["width"], info["height"])
        self.picture.set_zoom(self.picture.zoom)
        self.info.setText(self.info_text)
        self.setWindowTitle(info["path"])
        self.near_rows = list(near)
        self.near_model.set_photos([r[0] for r in near], [_near_note(*r[1:]) for r in near])
        self._paint()

    # -- the picture --------------------------------------------------------------------------
    def _wanted_side(self) -> int:
        """Decode size: bounded while fitted; the whole photo once zoomed past the bounded decode."""
        if self.picture.photo_size and self.picture.shown_zoom() * max(self.picture.photo_size) > PREVIEW_SIDE:
            return max(self.picture.photo_size)
        return PREVIEW_SIDE

    def _paint(self) -> None:
        pm = self.thumbs.pixmap(self.path, self._wanted_side())
        if pm is None:
            self.picture.source = None
            self.picture.placeholder = "cannot show this photo" if self.path in self.thumbs.unreadable else "…"
            self.picture.update()
            return
        self.picture.source = pm
        self.picture.set_zoom(self.picture.zoom)
        if self.photo_width:  # say how far the photo is enlarged or reduced
            self.info.setText(f"{self.info_text} · shown at {self.shown_percent():.0f} %"
                              + ("  (Z: 100 %)" if self.picture.zoom is None else "  (Z: fit)"))

    def shown_percent(self) -> float:
        return 100 * self.picture.shown_zoom()

    def _arrived(self, rel: str) -> None:
        if rel == self.path:
            self._paint()

    def resizeEvent(self, event):
        super().resizeEvent(event)
        if self.path:
            self._paint()

    # -- keys ---------------------------------------------------------------------------------
    def keyPressEvent(self, event):
        k = event.key()
        view = self.picture
        if k == Qt.Key.Key_Z:
            view.set_zoom(1.0 if view.zoom is None else None)
        elif k in (Qt.Key.Key_Plus, Qt.Key.Key_Equal):
            view.set_zoom(view.shown_zoom() * ZOOM_STEP)
        elif k == Qt.Key.Key_Minus:
            z = view.shown_zoom() / ZOOM_STEP
            view.set_zoom(None if z <= view.fit_zoom() else z)
        elif k in (Qt.Key.Key_Left, Qt.Key.Key_Right, Qt.Key.Key_Up, Qt.Key.Key_Down):
            # An arrow moves the view over the photo: the photo slides the other way.
            dx = {Qt.Key.Key_Left: PAN_STEP, Qt.Key.Key_Right: -PAN_STEP}.get(k, 0)
            dy = {Qt.Key.Key_Up: PAN_STEP, Qt.Key.Key_Down: -PAN_STEP}.get(k, 0)
            view.pan(dx, dy)
            return
        elif k in (Qt.Key.Key_PageDown, Qt.Key.Key_PageUp):
            self.step(1 if k == Qt.Key.Key_PageDown else -1)
            return
        elif k == Qt.Key.Key_Space:
            if self.toggle_out is None or self.path not in self.sequence:
                self.note.setText("Space takes a photo out only in a preview opened from the group")
            else:
                out = self.toggle_out(self.path)
                self._say_position("taken out" if out else "put back")
            return
        else:
            super().keyPressEvent(event)
            return
        self._paint()


def _near_note(similarity: float, state: str, label) -> str:
    what = f"“{label}”" if state == "labelled" else ("set aside" if state == "aside" else "no label")
    return f"{similarity:.2f} · {what}"     # the similarity first: a long label is elided, not it
