"""A photo model that hands its rows to the view a chunk at a time (Qt's canFetchMore/fetchMore), so a
grid of 20,000 photos opens without the GUI thread looping over all of them.

The model holds every path and note from the start (lists built on the engine thread); `rowCount`
grows by CHUNK rows each time the view asks for more (when the end of the loaded rows comes on
screen, or the scrollbar reaches its end). `paths` is the whole list, in order, as `PhotoModel`'s.
"""
from __future__ import annotations

from PySide6.QtCore import QModelIndex

from app.photo_grid import PhotoModel

CHUNK = 600   # rows handed to the view at a time (as the browse page's page of photos)


class LazyPhotoModel(PhotoModel):
    """A `PhotoModel` whose `rowCount` is the rows fetched so far (`loaded`), `total` the photos held."""

    def __init__(self, *args, chunk: int = CHUNK, **kwargs):
        super().__init__(*args, **kwargs)
        self.chunk = chunk
        self.loaded = 0

    @property
    def total(self) -> int:
        return len(self.paths)

    def set_photos(self, paths, notes=None) -> None:
        self.beginResetModel()
        self.paths = paths if isinstance(paths, list) else list(paths)
        if notes is None:
            self.notes = [""] * len(self.paths)
        else:
            self.notes = notes if isinstance(notes, list) else list(notes)
        self.out = set()
        self._rows = {}
        self.loaded = 0
        self._grow(min(self.chunk, len(self.paths)))
        self.endResetModel()

    def _grow(self, count: int) -> None:
        first = self.loaded
        for i in range(first, first + count):
            self._rows.setdefault(self.paths[i], []).append(i)
        self.loaded = first + count

    def rowCount(self, parent=QModelIndex()):
        return 0 if parent.isValid() else self.loaded

    def canFetchMore(self, parent=QModelIndex()) -> bool:
        return not parent.isValid() and self.loaded < len(self.paths)

    def fetchMore(self, parent=QModelIndex()) -> None:
        if not self.canFetchMore(parent):
            return
        count = min(self.chunk, len(self.paths) - self.loaded)
        self.beginInsertRows(QModelIndex(), self.loaded, self.loaded + count - 1)
        self._grow(count)
        self.endInsertRows()

    def fetch_until(self, row: int) -> None:
        """Make `row` a loaded row (fetching the chunks before it), e.g. to select a photo far down."""
        while self.loaded <= row and self.canFetchMore():
            self.fetchMore()

    def toggle(self, row: int) -> None:
        self.fetch_until(row)
        super().toggle(row)


def review_lists(rows) -> tuple[list[str], list[str]]:
    """`Project.review`'s [(path, typicality)] as the review grid's paths and card notes (run on the
    engine thread, so the GUI thread only hands the two lists to the model)."""
    return [p for p, _ in rows], [f"typicality {t:.2f}" for _, t in rows]
