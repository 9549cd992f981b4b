"""The export dialog through its own widgets (typing the destination, clicking Export, the offer to
replace): one all-or-nothing export of the chosen formats, and a plain, explicit choice when the engine
refuses to replace what Kinfold did not write.

Outside references: Python's csv module (RFC 4180 reader) and json module read what was written;
torchvision's ImageFolder reads the class folders.
"""
import csv
import json
import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")  # before any Qt import

import pytest
from PySide6.QtCore import Qt
from PySide6.QtTest import QTest

from app.export_dialog import COCO_NAME, CSV_NAME, FOLDERS_NAME, ExportDialog
from core.project import Project


@pytest.fixture
def project(photo_project_folder):
    with Project.open(photo_project_folder, annotator="tester") as p:
        for g, label in zip(p.propose(limit=3), ("cat", "mug", "rocket")):
            p.accept(g.id, label)
        yield p


@pytest.fixture
def dialog(qtbot, project):
    dlg = ExportDialog(project)
    qtbot.addWidget(dlg)
    dlg.show()
    qtbot.waitExposed(dlg)
    return dlg


def set_destination(qtbot, dlg, path) -> None:
    """Select what the field holds and type the new destination over it, as a user does."""
    field = dlg.destination
    field.setFocus()
    QTest.keyClick(field, Qt.Key.Key_A, Qt.KeyboardModifier.ControlModifier)
    QTest.keyClicks(field, str(path))
    assert field.text() == str(path)


def export(qtbot, dlg, button=None) -> None:
    """Click Export (or `button`) and wait until the export has ended."""
    QTest.mouseClick(button or dlg.run, Qt.MouseButton.LeftButton)
    qtbot.waitUntil(lambda: not dlg.running() and not dlg.progress.isVisible(), timeout=60_000)


def labelled(project) -> int:
    return sum(project.status().by_label.values())


def test_every_chosen_format_is_written_by_one_export(qtbot, dialog, project, tmp_path):
    dest = tmp_path / "labels-out"          # does not exist yet: the dialog makes it
    set_destination(qtbot, dialog, dest)
    export(qtbot, dialog)
    n = labelled(project)
    assert n > 0 and dialog.written is not None and dialog.refused is None
    with open(dest / CSV_NAME, newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == n == dialog.written["csv"]["rows"]
    coco = json.loads((dest / COCO_NAME).read_text())
    assert len(coco["images"]) == n and {c["name"] for c in coco["categories"]} == set(project.status().by_label)
    from torchvision.datasets import ImageFolder

    assert len(ImageFolder(str(dest / FOLDERS_NAME))) == n
    assert f"CSV: {n} rows" in dialog.report.text() and not dialog.replace.isVisible()

    # Again into the same folder: Kinfold's own files are replaced without asking.
    export(qtbot, dialog)
    assert dialog.refused is None and f"CSV: {n} rows" in dialog.report.text()


def test_a_file_of_the_users_is_refused_then_replaced_only_when_asked(qtbot, dialog, project, tmp_path):
    dest = tmp_path / "out"
    dest.mkdir()
    mine = dest / COCO_NAME
    mine.write_text("my own notes, not an export\n")
    set_destination(qtbot, dialog, dest)
    export(qtbot, dialog)

    # Refused as a whole: the CSV and the class folders, which could have been written, are not.
    assert dialog.written is None and dialog.refused is not None
    assert mine.read_text() == "my own notes, not an export\n"
    assert sorted(os.listdir(dest)) == [COCO_NAME]
    text = dialog.report.text()
    assert text.startswith("⚠") and str(mine) in text and "not a Kinfold export" in text
    assert "Nothing was written" in text and "--overwrite" not in text and "\n" not in text
    assert dialog.replace.isVisible() and dialog.replace.text() == f"Replace {COCO_NAME}"

    # Return in the dialog runs its default button, Export, which refuses again: never the replacement.
    assert dialog.run.isDefault() and not dialog.replace.isDefault() and not dialog.replace.autoDefault()
    dialog.destination.setFocus()
    QTest.keyClick(dialog.destination, Qt.Key.Key_Return)
    qtbot.waitUntil(lambda: not dialog.running() and not dialog.progress.isVisible(), timeout=60_000)
    assert dialog.refused is not None and mine.read_text() == "my own notes, not an export\n"

    # The explicit choice: everything is written, the user's file replaced by the COCO export.
    export(qtbot, dialog, dialog.replace)
    n = labelled(project)
    assert dialog.refused is None and dialog.written is not None and not dialog.replace.isVisible()
    assert len(json.loads(mine.read_text())["images"]) == n
    assert (dest / CSV_NAME).is_file() and (dest / FOLDERS_NAME).is_dir()

    # The choice held for that export only: a new file of the user's is refused again.
    mine.write_text("notes again\n")
    export(qtbot, dialog)
    assert dialog.refused is not None and mine.read_text() == "notes again\n"


def test_a_changed_destination_withdraws_the_offer(qtbot, dialog, tmp_path):
    dest = tmp_path / "out"
    dest.mkdir()
    (dest / CSV_NAME).write_text("a,b\n1,2\n")
    set_destination(qtbot, dialog, dest)
    export(qtbot, dialog)
    assert dialog.replace.isVisible()
    set_destination(qtbot, dialog, tmp_path / "elsewhere")
    assert not dialog.replace.isVisible() and dialog.refused is None
    dialog.coco.setChecked(False)
    export(qtbot, dialog)
    assert dialog.written is not None and (tmp_path / "elsewhere" / CSV_NAME).is_file()
    assert not (tmp_path / "elsewhere" / COCO_NAME).exists()
    assert (dest / CSV_NAME).read_text() == "a,b\n1,2\n"


def test_a_foreign_folder_is_written_into_only_when_asked(qtbot, dialog, tmp_path):
    dest = tmp_path / "out"
    (dest / FOLDERS_NAME).mkdir(parents=True)
    (dest / FOLDERS_NAME / "README.txt").write_text("mine")
    dialog.csv.setChecked(False)
    dialog.coco.setChecked(False)
    set_destination(qtbot, dialog, dest)
    export(qtbot, dialog)
    assert dialog.refused is not None and "not empty" in dialog.report.text()
    assert dialog.replace.text().startswith(f"Write into {FOLDERS_NAME}")
    assert os.listdir(dest / FOLDERS_NAME) == ["README.txt"]
    export(qtbot, dialog, dialog.replace)
    assert dialog.written is not None
    assert (dest / FOLDERS_NAME / "README.txt").read_text() == "mine"      # kept, as the offer said
    assert len([d for d in (dest / FOLDERS_NAME).iterdir() if d.is_dir()]) == 3


def test_a_destination_inside_the_photo_folder_leaves_no_trace(qtbot, dialog, project, tmp_path):
    dest = project.folder / "export"
    set_destination(qtbot, dialog, dest)
    export(qtbot, dialog)
    assert dialog.written is None and dialog.refused is None and not dialog.replace.isVisible()
    assert "inside the photo folder" in dialog.report.text() and not dest.exists()

    # A destination whose parent folder is missing: one line, nothing made.
    missing = tmp_path / "no-such" / "out"
    set_destination(qtbot, dialog, missing)
    export(qtbot, dialog)
    assert "does not exist" in dialog.report.text() and not missing.parent.exists()


def tick(box) -> None:
    """Click a check box on its indicator, as a user does."""
    from PySide6.QtCore import QPoint
    QTest.mouseClick(box, Qt.MouseButton.LeftButton, Qt.KeyboardModifier.NoModifier, QPoint(8, box.height() // 2))


def test_a_split_without_folders_and_the_links_sentence(qtbot, dialog, project, tmp_path):
    """Issue 20: the split serves the CSV (a split column) and COCO (one file per split, read back with
    pycocotools) without class folders; the dialog says why links are the default and which it wrote."""
    from pycocotools.coco import COCO

    from core.export import WHY_LINKS

    assert dialog.why_links.text() == WHY_LINKS and dialog.why_links.isVisible()
    dest = tmp_path / "split-out"
    set_destination(qtbot, dialog, dest)
    tick(dialog.folders)
    assert not dialog.folders.isChecked() and dialog.split.isEnabled()
    tick(dialog.split)
    assert dialog.split.isChecked()
    export(qtbot, dialog)
    with open(dest / CSV_NAME, newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    assert len(rows) == labelled(project) and {r["split"] for r in rows} <= {"train", "val", "test"}
    stem, _, rest = COCO_NAME.partition(".")
    seen = {}
    for part in ("train", "val", "test"):
        coco = COCO(str(dest / f"{stem}-{part}.{rest}"))
        seen.update({img["file_name"]: part for img in coco.loadImgs(coco.getImgIds())})
    assert seen == {r["path"]: r["split"] for r in rows}
    assert not (dest / COCO_NAME).exists() and "COCO JSON (train)" in dialog.report.text()

    # Class folders alone, default links: the report says links.
    set_destination(qtbot, dialog, tmp_path / "linked")
    for box in (dialog.csv, dialog.coco, dialog.folders, dialog.split):
        tick(box)
    export(qtbot, dialog)
    assert "symbolic links to the originals" in dialog.report.text()
