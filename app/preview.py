"""Full-size preview of one photo: the picture, its file name, size and label, and its nearest photos."""
from __future__ import annotations

from PySide6.QtCore import Qt
from PySide6.QtWidgets import QDialog, QHBoxLayout, QLabel, QSizePolicy, QVBoxLayout

from app.photo_grid import PhotoGrid, PhotoModel, box_height
from app.thumbnails import Thumbnails

PREVIEW_SIDE = 1400   # decode bound; the dialog shows it scaled to fit


class PreviewDialog(QDialog):
    """`fetch(path, then)` reads the photo's facts and nearest photos from the engine (on its thread) and
    calls `then(info, near)` on the GUI thread."""

    def __init__(self, fetch, thumbs: Thumbnails, path: str, parent=None):
        super().__init__(parent)
        self.fetch, self.thumbs = fetch, thumbs
        self.setWindowTitle("Photo")
        self.resize(1000, 760)
        self.picture = QLabel("…")
        self.picture.setAlignment(Qt.AlignmentFlag.AlignCenter)
        self.picture.setMinimumSize(320, 240)
        self.picture.setSizePolicy(QSizePolicy.Policy.Ignored, QSizePolicy.Policy.Ignored)
        self.info = QLabel()
        self.info.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.info.setWordWrap(True)
        self.near_model = PhotoModel(thumbs, self)
        self.near = PhotoGrid(self.near_model, notes=True, fit=False)
        self.near_model.set_side(112)
        self.near.setFlow(PhotoGrid.Flow.LeftToRight)
        self.near.setWrapping(False)
        self.near.setVerticalScrollBarPolicy(Qt.ScrollBarPolicy.ScrollBarAlwaysOff)
        self.near.setFixedHeight(box_height(112) + 2 * 6 + 2 * (self.near.fontMetrics().height() + 2) + 34)
        heading = QLabel("Nearest photos (double-click to show one)")
        heading.setObjectName("heading")
        lay = QVBoxLayout(self)
        lay.addWidget(self.picture, 1)
        lay.addWidget(self.info)
        lay.addWidget(heading)
        lay.addWidget(self.near)
        self.near.opened.connect(self.show_photo)
        thumbs.ready.connect(self._arrived)
        self.path = None
        self.show_photo(path)

    def show_photo(self, path: str) -> None:
        self.path = path
        self.photo_width = 0
        self.info_text = path
        self.info.setText(path)
        self._paint()
        self.fetch(path, lambda info, near: self._show_info(path, info, near))

    def _show_info(self, path: str, info: dict, near) -> None:
        if path != self.path:
            return  # another photo was asked for meanwhile
        state = {"labelled": f"labelled “{info['label']}”", "set_aside": "set aside (no class)",
                 "unlabelled": "not labelled yet"}.get(info["state"], info["state"])
        self.info_text = (f"<b>{info['path']}</b><br>{info['width']} × {info['height']} px · "
                          f"{info['bytes'] / 1024:.0f} KB · {state}")
        self.photo_width = info["width"]
        self.info.setText(self.info_text)
        self.setWindowTitle(info["path"])
        self.near_model.set_photos([p for p, _ in near], [f"similarity {s:.2f}" for _, s in near])
        self._paint()

    def _paint(self) -> None:
        pm = self.thumbs.pixmap(self.path, PREVIEW_SIDE)
        if pm is None:
            self.picture.setText("cannot show this photo" if self.path in self.thumbs.unreadable else "…")
            return
        shown = pm.scaled(self.picture.size(), Qt.AspectRatioMode.KeepAspectRatio,
                          Qt.TransformationMode.SmoothTransformation)
        self.picture.setPixmap(shown)
        if self.photo_width:  # say how far the photo is enlarged or reduced to fill the dialog
            self.info.setText(f"{self.info_text} · shown at {100 * shown.width() / self.photo_width:.0f} %")

    def _arrived(self, rel: str) -> None:
        if rel == self.path:
            self._paint()

    def resizeEvent(self, event):
        super().resizeEvent(event)
        if self.path:
            self._paint()
