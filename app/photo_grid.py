"""A grid of photo thumbnails: list model, card painter and view, shared by the group, review and
preview screens. Taken-out photos are greyed, struck through, badged with an X and captioned
"taken out", so the state never rests on colour alone."""
from __future__ import annotations

import math

from PySide6.QtCore import QAbstractListModel, QModelIndex, QPoint, QRect, QSize, Qt, Signal
from PySide6.QtGui import QColor, QFont, QFontMetrics, QPainter, QPen
from PySide6.QtWidgets import QAbstractItemView, QListView, QStyle, QStyledItemDelegate

from app import theme
from app.thumbnails import Thumbnails

PATH_ROLE = Qt.ItemDataRole.UserRole + 1
OUT_ROLE = Qt.ItemDataRole.UserRole + 2
NOTE_ROLE = Qt.ItemDataRole.UserRole + 3

PAD = 6
SPACING = 8
MIN_SIDE, MAX_SIDE = 112, 360   # rule of thumb: below ~110 px parts become hard to tell apart
BOX_RATIO = 0.75                # thumbnail boxes are 4:3, the shape of most camera photos


def box_height(side: int) -> int:
    return round(side * BOX_RATIO)


def elide_path(fm: QFontMetrics, path: str, width: int) -> str:
    """A relative path cut to `width` px: the subfolders shortened in the middle before the file name is."""
    if fm.horizontalAdvance(path) <= width or "/" not in path:
        return fm.elidedText(path, Qt.TextElideMode.ElideMiddle, width)
    folder, name = path.rsplit("/", 1)
    room = width - fm.horizontalAdvance("/" + name)
    if room >= 7 * fm.averageCharWidth():  # enough of the folder to recognise it by
        return fm.elidedText(folder, Qt.TextElideMode.ElideMiddle, room) + "/" + name
    if fm.horizontalAdvance("…/" + name) <= width:
        return "…/" + name
    return fm.elidedText(name, Qt.TextElideMode.ElideMiddle, width)


class PhotoModel(QAbstractListModel):
    """The photos of a grid by relative path, with the set taken out. `out_changed` says when a photo
    was taken out or put back; `hint` is the line of the tooltip saying what the mouse does."""

    out_changed = Signal()

    def __init__(self, thumbs: Thumbnails, parent=None, hint: str = "Double-click to see it full size"):
        super().__init__(parent)
        self.thumbs = thumbs
        self.hint = hint
        self.paths: list[str] = []
        self.notes: list[str] = []
        self.out: set[str] = set()
        self.side = 160
        self._rows: dict[str, list[int]] = {}
        thumbs.ready.connect(self._thumb_ready)

    def set_photos(self, paths, notes=None) -> None:
        self.beginResetModel()
        self.paths = list(paths)
        self.notes = list(notes) if notes is not None else [""] * len(self.paths)
        self.out = set()
        self._rows = {}
        for i, p in enumerate(self.paths):
            self._rows.setdefault(p, []).append(i)
        self.endResetModel()

    def set_side(self, side: int) -> None:
        if side != self.side:
            self.side = side
            self.layoutChanged.emit()

    def toggle(self, row: int) -> None:
        p = self.paths[row]
        self.out.symmetric_difference_update({p})
        idx = self.index(row)
        self.dataChanged.emit(idx, idx, [OUT_ROLE])
        self.out_changed.emit()

    def taken_out(self) -> list[str]:
        return [p for p in self.paths if p in self.out]

    def rowCount(self, parent=QModelIndex()):
        return 0 if parent.isValid() else len(self.paths)

    def data(self, index, role=Qt.ItemDataRole.DisplayRole):
        if not index.isValid():
            return None
        p = self.paths[index.row()]
        if role == Qt.ItemDataRole.DisplayRole:
            return p  # with its subfolder (the folder often says what a photo is); see elide_path
        if role == Qt.ItemDataRole.DecorationRole:
            return self.thumbs.pixmap(p, self.side)
        if role == PATH_ROLE:
            return p
        if role == OUT_ROLE:
            return p in self.out
        if role == NOTE_ROLE:
            return self.notes[index.row()]
        if role == Qt.ItemDataRole.ToolTipRole:
            note = self.notes[index.row()]
            lines = [p + ("  (taken out)" if p in self.out else ""), note, self.hint]
            return "\n".join(line for line in lines if line)
        if role == Qt.ItemDataRole.AccessibleTextRole:
            return p + (", taken out" if p in self.out else "")
        return None

    def _thumb_ready(self, rel: str) -> None:
        for r in self._rows.get(rel, ()):
            idx = self.index(r)
            self.dataChanged.emit(idx, idx, [Qt.ItemDataRole.DecorationRole])


class PhotoCard(QStyledItemDelegate):
    """One card: thumbnail in a square box, file name, optional note line."""

    def __init__(self, parent=None, notes: bool = False):
        super().__init__(parent)
        self.notes = notes

    def _lines(self) -> int:
        return 2 if self.notes else 1

    def sizeHint(self, option, index):
        side = index.model().side
        fm = QFontMetrics(option.font)
        return QSize(side + 2 * PAD, box_height(side) + 2 * PAD + self._lines() * (fm.height() + 2))

    def paint(self, painter: QPainter, option, index):
        painter.save()
        painter.setRenderHint(QPainter.RenderHint.Antialiasing)
        r = option.rect.adjusted(1, 1, -1, -1)
        side = index.model().side
        out = bool(index.data(OUT_ROLE))
        selected = bool(option.state & QStyle.StateFlag.State_Selected)
        current = bool(option.state & QStyle.StateFlag.State_HasFocus)
        painter.setPen(QPen(QColor(theme.LINE), 1))
        painter.setBrush(QColor(theme.ACCENT_SOFT if selected else theme.SURFACE))
        painter.drawRoundedRect(r, 6, 6)

        box = QRect(r.left() + PAD - 1, r.top() + PAD - 1, side, box_height(side))
        pm = index.data(Qt.ItemDataRole.DecorationRole)
        if pm is not None:
            size = pm.size().scaled(box.size(), Qt.AspectRatioMode.KeepAspectRatio)
            if pm.width() < box.width() and pm.height() < box.height():
                size = pm.size()  # never enlarge a small photo
            target = QRect(0, 0, size.width(), size.height())
            target.moveCenter(box.center())
            painter.setOpacity(0.28 if out else 1.0)
            painter.drawPixmap(target, pm)
            painter.setOpacity(1.0)
            shown = True
        else:
            painter.setPen(QColor(theme.MUTED))
            shown = index.data(PATH_ROLE) in index.model().thumbs.unreadable
            painter.drawText(box, Qt.AlignmentFlag.AlignCenter, "no preview" if shown else "…")
        if shown and isinstance(self.parent(), PhotoGrid):  # "…" while loading is not the photo
            self.parent().mark_seen(index.row(), option.rect)

        if out:
            self._cross_badge(painter, box)
            self._out_tag(painter, box, option.font)
        if selected:
            self._tick_badge(painter, box)

        fm = QFontMetrics(option.font)
        text_rect = QRect(r.left() + PAD, box.bottom() + 3, r.width() - 2 * PAD, fm.height())
        font = QFont(option.font)
        font.setStrikeOut(out)
        painter.setFont(font)
        painter.setPen(QColor(theme.MUTED if out else theme.INK))
        painter.drawText(text_rect, Qt.AlignmentFlag.AlignHCenter,
                         elide_path(fm, str(index.data(Qt.ItemDataRole.DisplayRole)), text_rect.width()))
        if self.notes:
            font.setStrikeOut(False)
            painter.setFont(font)
            painter.setPen(QColor(theme.MUTED))
            painter.drawText(text_rect.translated(0, fm.height() + 2), Qt.AlignmentFlag.AlignHCenter,
                             fm.elidedText(str(index.data(NOTE_ROLE) or ""), Qt.TextElideMode.ElideRight,
                                           text_rect.width()))
        if current:  # the keyboard position: a thick outline, visible without colour vision
            painter.setBrush(Qt.BrushStyle.NoBrush)
            painter.setPen(QPen(QColor(theme.INK), 3))
            painter.drawRoundedRect(r.adjusted(1, 1, -1, -1), 6, 6)
        painter.restore()

    @staticmethod
    def _badge(painter: QPainter, box: QRect, colour: str) -> QRect:
        d = max(22, box.width() // 6)
        badge = QRect(box.right() - d - 4, box.top() + 4, d, d)
        painter.setPen(QPen(QColor("white"), 2))
        painter.setBrush(QColor(colour))
        painter.drawEllipse(badge)
        return badge

    @staticmethod
    def _out_tag(painter: QPainter, box: QRect, font: QFont) -> None:
        bold = QFont(font)
        bold.setBold(True)
        fm = QFontMetrics(bold)
        tag = QRect(0, 0, fm.horizontalAdvance("TAKEN OUT") + 16, fm.height() + 6)
        tag.moveCenter(box.center())
        painter.setPen(Qt.PenStyle.NoPen)
        painter.setBrush(QColor(theme.INK))
        painter.drawRoundedRect(tag, 4, 4)
        painter.setPen(QColor("white"))
        painter.setFont(bold)
        painter.drawText(tag, Qt.AlignmentFlag.AlignCenter, "TAKEN OUT")

    def _cross_badge(self, painter: QPainter, box: QRect) -> None:
        b = self._badge(painter, box, theme.PROBLEM).adjusted(7, 7, -7, -7)
        painter.setPen(QPen(QColor("white"), 3, Qt.PenStyle.SolidLine, Qt.PenCapStyle.RoundCap))
        painter.drawLine(b.topLeft(), b.bottomRight())
        painter.drawLine(b.topRight(), b.bottomLeft())

    def _tick_badge(self, painter: QPainter, box: QRect) -> None:
        b = self._badge(painter, box, theme.ACCENT).adjusted(6, 7, -6, -6)
        painter.setPen(QPen(QColor("white"), 3, Qt.PenStyle.SolidLine, Qt.PenCapStyle.RoundCap))
        painter.drawPolyline([QPoint(b.left(), b.center().y()), QPoint(b.center().x() - 1, b.bottom()),
                              b.topRight()])


def columns(width: int, card_width: int, spacing: int = SPACING // 2) -> int:
    """How many cards QListView's icon layout puts in a row of a `width`-px layout area: the first card
    `spacing` px in, cards `spacing` apart, and a new row once a card would reach the right edge
    (measured against Qt 6's layout in tests/test_grid_layout.py)."""
    return max(1, (width - spacing - 1) // (card_width + spacing))


def rows_height(rows: int, card_height: int, spacing: int = SPACING // 2) -> int:
    """The height QListView's icon layout needs for `rows` rows of cards (its contents height)."""
    return spacing + rows * (card_height + spacing)


def fitting_side(width: int, height: int, count: int, extra_height: int,
                 lo: int = MIN_SIDE, hi: int = MAX_SIDE, spacing: int = SPACING // 2) -> int:
    """The largest thumbnail side (step 8 px, so cached sizes get reused) at which `count` cards fit a
    width x height layout area without scrolling; `lo` when none does (the grid then scrolls).
    `extra_height`: the card's height below its thumbnail box and padding (the caption lines)."""
    for side in range(hi, lo - 1, -8):
        cols = columns(width, side + 2 * PAD, spacing)
        rows = math.ceil(max(count, 1) / cols)
        if rows_height(rows, box_height(side) + 2 * PAD + extra_height, spacing) <= height:
            return side
    return lo


class PhotoGrid(QListView):
    """Icon-mode list of photo cards. `typed` carries a printable key pressed on the grid (so the
    window can start a label with it); `opened` a photo double-clicked; `escaped` Esc on the grid.

    A fitted grid sizes its cards so the whole group fits the viewport, or, below the smallest readable
    size, scrolls with a scrollbar. It remembers which cards have been fully on screen with their
    picture since the photos were set (`unseen_paths`), so nothing is labelled that was never shown."""

    typed = Signal(str)
    opened = Signal(str)
    escaped = Signal()

    def __init__(self, model: PhotoModel, parent=None, notes: bool = False, fit: bool = True):
        super().__init__(parent)
        self.setModel(model)
        self.card = PhotoCard(self, notes=notes)
        self.setItemDelegate(self.card)
        self.setViewMode(QListView.ViewMode.IconMode)
        self.setMovement(QListView.Movement.Static)
        self.setResizeMode(QListView.ResizeMode.Adjust)
        # Qt caches a uniform card size; a fitted grid changes its size, so only fixed grids use the cache.
        self.setUniformItemSizes(not fit)
        self.setSpacing(SPACING // 2)
        self.setWrapping(True)
        self.setSelectionMode(QAbstractItemView.SelectionMode.NoSelection)
        self.setVerticalScrollMode(QAbstractItemView.ScrollMode.ScrollPerPixel)
        self.fit = fit
        self.seen: set[int] = set()  # rows drawn whole, with their picture, since the photos were set
        self.doubleClicked.connect(lambda idx: self.opened.emit(idx.data(PATH_ROLE)))
        model.modelReset.connect(self.seen.clear)
        model.modelReset.connect(self.refit)

    def photo_model(self) -> PhotoModel:
        return self.model()

    def current_path(self) -> str | None:
        idx = self.currentIndex()
        return idx.data(PATH_ROLE) if idx.isValid() else None

    # -- fitting ------------------------------------------------------------------------------
    def layout_area(self) -> tuple[int, int]:
        """The width QListView lays rows out in and the height it shows without scrolling. Qt keeps
        room for the vertical scrollbar in the width whether or not it is shown, so the number of
        columns does not change when the scrollbar comes or goes."""
        full = self.maximumViewportSize()
        bar = self.style().pixelMetric(QStyle.PixelMetric.PM_ScrollBarExtent, None, self.verticalScrollBar())
        return full.width() - bar, full.height()

    def _caption_height(self) -> int:
        self.ensurePolished()  # the style sheet's font, as the cards will be drawn with it
        return self.card._lines() * (QFontMetrics(self.font()).height() + 2)

    def side_for(self, count: int) -> int:
        width, height = self.layout_area()
        return fitting_side(width, height, count, self._caption_height(), spacing=self.spacing())

    def refit(self) -> None:
        if not self.fit:
            return
        model = self.photo_model()
        count = model.rowCount()
        side = self.side_for(count)
        model.set_side(side)
        if count:
            # Check against Qt's own layout: should a style lay cards out differently from
            # `fitting_side`, step down rather than leave a row cut off.
            _, height = self.layout_area()
            self.doItemsLayout()
            while self.contentsSize().height() > height and model.side > MIN_SIDE:
                model.set_side(model.side - 8)
                self.doItemsLayout()
            if not self.currentIndex().isValid():
                self.setCurrentIndex(model.index(0))

    def resizeEvent(self, event):
        super().resizeEvent(event)
        self.refit()

    # -- what has been on screen --------------------------------------------------------------
    def mark_seen(self, row: int, rect: QRect) -> None:
        """Called by the card painter: a card drawn whole inside the viewport has been on screen."""
        if self.viewport().rect().contains(rect):
            self.seen.add(row)

    def unseen_paths(self) -> list[str]:
        """Members not taken out whose card has not been fully on screen since the photos were set."""
        model = self.photo_model()
        return [p for i, p in enumerate(model.paths) if i not in self.seen and p not in model.out]

    def show_first_unseen(self) -> None:
        unseen = self.unseen_paths()
        if unseen:
            idx = self.photo_model().index(self.photo_model().paths.index(unseen[0]))
            self.setCurrentIndex(idx)
            self.scrollTo(idx, QAbstractItemView.ScrollHint.PositionAtTop)
        self.setFocus()

    def keyPressEvent(self, event):
        if event.key() == Qt.Key.Key_Escape:
            self.escaped.emit()  # and on to the page (the review page goes back on Esc)
        text = event.text()
        mods = event.modifiers() & ~Qt.KeyboardModifier.ShiftModifier & ~Qt.KeyboardModifier.KeypadModifier
        if text and text.isprintable() and not text.isspace() and text != "?" and mods == Qt.KeyboardModifier.NoModifier:
            self.typed.emit(text)
            return
        if text == "?" or (event.key() == Qt.Key.Key_Space
                           and self.selectionMode() == QAbstractItemView.SelectionMode.NoSelection):
            # The window's keys (help, take out) rather than the list's type-to-find: when no shortcut
            # took them (the window not active), they go on up to the window.
            event.ignore()
            return
        super().keyPressEvent(event)
