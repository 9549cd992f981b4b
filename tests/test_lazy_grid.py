"""The review grid hands its rows to the view a chunk at a time (app/lazy_grid.py): what the view can
reach by scrolling is every photo, in the order given, and a relabel made on a photo of a later chunk
lands in the store. Driven by real key events on the widgets (offscreen)."""
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")  # before any Qt import

from PySide6.QtCore import QItemSelectionModel, Qt

from app.lazy_grid import CHUNK, LazyPhotoModel, review_lists
from app.pages import ReviewPage
from app.photo_grid import PATH_ROLE
from app.thumbnails import Thumbnails
from tests.test_browse_window import idle, key, labelled_folder, w  # noqa: F401  (fixtures)

C = Qt.KeyboardModifier.ControlModifier


def test_rows_come_a_chunk_at_a_time_and_scrolling_reaches_every_photo(qtbot):
    paths = [f"part{i % 7}/photo_{i:05d}.png" for i in range(2 * CHUNK + 137)]
    model = LazyPhotoModel(Thumbnails())
    page = ReviewPage(model)
    qtbot.addWidget(page)
    page.resize(700, 500)
    page.show()
    qtbot.waitExposed(page)
    model.set_photos(*review_lists([(p, i / len(paths)) for i, p in enumerate(paths)]))
    assert model.rowCount() == CHUNK and model.total == len(paths)   # nothing beyond the first chunk yet
    grid = page.grid
    grid.setFocus()
    grid.setCurrentIndex(model.index(0))
    for _ in range(20):                      # End, as a user would press it, until nothing more comes
        qtbot.keyClick(grid, Qt.Key.Key_End)
        qtbot.wait(20)
        if model.rowCount() == len(paths):
            break
    assert model.rowCount() == len(paths)
    qtbot.keyClick(grid, Qt.Key.Key_End)
    assert grid.current_path() == paths[-1]
    # every row, in the order handed in (the list built above, not the model's own)
    assert [model.index(r).data(PATH_ROLE) for r in range(model.rowCount())] == paths
    assert model.index(5).data(Qt.ItemDataRole.ToolTipRole).splitlines()[1] == f"typicality {5 / len(paths):.2f}"


def test_new_photos_start_again_from_the_first_chunk(qtbot):
    model = LazyPhotoModel(Thumbnails())
    model.set_photos([f"p{i}.png" for i in range(3 * CHUNK)])
    while model.canFetchMore():
        model.fetchMore()
    assert model.rowCount() == 3 * CHUNK
    model.set_photos(["a.png", "b.png"])
    assert model.rowCount() == 2 and not model.canFetchMore()
    model.set_photos([])
    assert model.rowCount() == 0 and not model.canFetchMore()


def test_relabel_a_photo_from_a_later_chunk(qtbot, w):
    """Chunks of two photos: the least typical "cat" photos come first, the last one needs scrolling;
    relabelling it through the review page's field is recorded in the store."""
    w.review_model.chunk = 2
    expected = [p for p, _ in w.project.review("cat")]
    assert len(expected) == 5
    w.side.labels.setFocus()
    key(qtbot, w.group_page.grid, Qt.Key.Key_R, C)
    idle(qtbot, w)
    page = w.review_page
    assert w.review_model.paths == expected
    grid = page.grid
    grid.setFocus()
    for _ in range(10):
        qtbot.keyClick(grid, Qt.Key.Key_End)
        qtbot.wait(20)
    assert w.review_model.rowCount() == 5
    assert grid.current_path() == expected[-1]
    grid.selectionModel().setCurrentIndex(grid.currentIndex(), QItemSelectionModel.SelectionFlag.ClearAndSelect)
    assert page.selected_paths() == [expected[-1]]
    page.new_label.setText("kitten")
    page.relabel.click()
    idle(qtbot, w)
    assert w.project.photo_info(expected[-1])["label"] == "kitten"      # read back from the engine
    assert w.project.store.decisions()[-1]["kind"] in ("label", "relabel")
    assert expected[-1] not in [q for q, _ in w.project.review("cat")]
