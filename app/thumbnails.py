"""Thumbnails decoded off the GUI thread, at the size they are shown, kept in QPixmapCache.

QImageReader decodes straight to the requested size (JPEG scaled decoding) and applies the EXIF
orientation; files Qt cannot read go through the engine's own decoder (`core.images.load_rgb`).
"""
from __future__ import annotations

from pathlib import Path

from PySide6.QtCore import QObject, QRunnable, QSize, Qt, QThreadPool, Signal
from PySide6.QtGui import QImage, QImageReader, QPixmap, QPixmapCache

# Enough for several screens of large thumbnails (KiB): the grid, the next group and the preview.
CACHE_KIB = 256 * 1024


def decode(path: Path, side: int) -> QImage:
    """The photo scaled to fit a side x side box (never enlarged), upright; a null image if unreadable."""
    reader = QImageReader(str(path))
    reader.setAutoTransform(True)
    size = reader.size()
    if size.isValid() and size.width() > 0:
        scale = min(1.0, side / max(size.width(), size.height()))
        reader.setScaledSize(QSize(max(1, round(size.width() * scale)), max(1, round(size.height() * scale))))
    img = reader.read()
    if not img.isNull():
        return img
    try:
        from core.images import load_rgb

        pil = load_rgb(path)
        pil.thumbnail((side, side))
        data = pil.tobytes()
        return QImage(data, pil.width, pil.height, 3 * pil.width, QImage.Format.Format_RGB888).copy()
    except Exception:  # unreadable either way: the grid shows a "no preview" card
        return QImage()


class _Decoded(QObject):
    done = Signal(str, str, int, QImage)


class _Decode(QRunnable):
    def __init__(self, folder: Path, rel: str, side: int, out: _Decoded):
        super().__init__()
        self.folder, self.rel, self.side, self.out = folder, rel, side, out

    def run(self):
        img = decode(self.folder / self.rel, self.side)
        try:
            self.out.done.emit(str(self.folder), self.rel, self.side, img)
        except RuntimeError:  # the window closed while this photo was decoding
            pass


class Thumbnails(QObject):
    """`pixmap(rel, side)` answers at once from the cache (or with a smaller cached one, scaled) and
    asks for the exact size in the background; `ready(rel)` says when it arrived."""

    ready = Signal(str)

    def __init__(self, folder: Path | None = None, parent: QObject | None = None):
        super().__init__(parent)
        self.folder = Path(folder) if folder else Path()
        QPixmapCache.setCacheLimit(max(QPixmapCache.cacheLimit(), CACHE_KIB))
        self._pool = QThreadPool(self)
        self._pool.setMaxThreadCount(2)
        self._pending: set[tuple[str, int]] = set()
        self._sides: dict[str, set[int]] = {}
        self.unreadable: set[str] = set()
        self._decoded = _Decoded()
        self._decoded.done.connect(self._arrived)

    def set_folder(self, folder: Path) -> None:
        self.forget_queue()
        self.folder = Path(folder)
        self._sides.clear()
        self.unreadable.clear()

    def _key(self, rel: str, side: int) -> str:
        return f"kinfold:{self.folder}:{side}:{rel}"

    def cached(self, rel: str, side: int) -> QPixmap | None:
        return QPixmapCache.find(self._key(rel, side))

    def pixmap(self, rel: str, side: int) -> QPixmap | None:
        pm = self.cached(rel, side)
        if pm is not None:
            return pm
        self.request(rel, side)
        for other in sorted(self._sides.get(rel, ()), reverse=True):  # a stand-in while it loads
            pm = self.cached(rel, other)
            if pm is not None:
                return pm
        return None

    def request(self, rel: str, side: int, priority: int = 1) -> None:
        if (rel, side) in self._pending or rel in self.unreadable or self.cached(rel, side) is not None:
            return
        self._pending.add((rel, side))
        self._pool.start(_Decode(self.folder, rel, side, self._decoded), priority)

    def prefetch(self, rels, side: int) -> None:
        for rel in rels:
            self.request(rel, side, priority=0)

    def forget_queue(self) -> None:
        """Drop decodes not started yet (the group they were for is gone)."""
        self._pool.clear()
        self._pending.clear()

    def _arrived(self, folder: str, rel: str, side: int, img: QImage) -> None:
        if folder != str(self.folder):
            return  # decoded for a folder closed since
        self._pending.discard((rel, side))
        if img.isNull():
            self.unreadable.add(rel)
        else:
            QPixmapCache.insert(self._key(rel, side), QPixmap.fromImage(img))
            self._sides.setdefault(rel, set()).add(side)
        self.ready.emit(rel)

    def shutdown(self) -> None:
        self._pool.clear()
        self._pool.waitForDone(5000)
