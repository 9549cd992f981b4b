"""Bringing labels in (core/label_import.py) and renaming/merging labels (core/label_rename.py): the API,
undo, exports read back by outside readers (Python's csv module for RFC 4180, pycocotools for COCO), and
`kinfold import` / `kinfold rename` run as subprocesses.

The photo folder is tests/conftest.py's: scikit-image sample photos, 5 variants each, astronaut/camera/
chelsea under a/, coffee/coins/rocket under b/ (30 photos), plus notes.txt and a truncated b/broken.jpg.
"""
import csv
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from core.label_rename import NameQuestion
from core.project import Project, ProjectError

ROOT = Path(__file__).resolve().parent.parent


def kinfold(*args):
    return subprocess.run([sys.executable, "-m", "app.cli", *map(str, args)], cwd=ROOT, capture_output=True,
                          text=True, timeout=300)


def labels_by_path(p: Project) -> dict[str, str | None]:
    return {path: p.photo_info(path)["label"] for path in p.photos()}


def write_csv(path: Path, header, rows):
    # Written by Python's csv module (RFC 4180 quoting), as another tool would write it.
    with open(path, "w", newline="", encoding="utf-8") as f:
        w = csv.writer(f)
        w.writerow(header)
        w.writerows(rows)


# ------------------------------------------------------------------------------------------ CSV
def test_csv_import_counts_reasons_and_chosen_columns(photo_project_folder, tmp_path):
    folder = photo_project_folder
    rows = [["a/chelsea_0.jpg", "x", 'cat, "tabby"'],                         # relative; comma and quotes
            [str(folder / "a" / "chelsea_1.jpg"), "x", 'cat, "tabby"'],       # absolute inside the folder
            ["./b/coffee_0.jpg", "x", "coffee"],
            ["b\\coffee_1.jpg", "x", "coffee"],                               # written on Windows
            ["b/coffee_2.jpg", "x", "two\nlines"],                            # a label with a line break
            [str(tmp_path / "elsewhere.jpg"), "x", "coffee"],                 # outside the folder
            ["../photos/b/coffee_3.jpg", "x", "coffee"],                      # climbs out, even if back in
            ["b/nothing.jpg", "x", "coffee"],
            ["b/broken.jpg", "x", "coffee"],                                  # skipped by the scan
            ["b/coins_0.jpg", "x", "   "],                                    # no label
            ["b/coins_1.jpg"],                                                # too few cells
            ["b/\x00.jpg", "x", "coffee"], ["x" * 5000, "x", "coffee"],         # no file can be named so
            ["/etc/\x00", "x", "coffee"]]
    write_csv(tmp_path / "in.csv", ["file name", "note", "Kind"], rows)
    with Project.open(folder) as p:
        with pytest.raises(ProjectError, match="cannot tell which column"):
            p.import_labels(csv=tmp_path / "in.csv")
        with pytest.raises(ProjectError, match="no column 'species'"):
            p.import_labels(csv=tmp_path / "in.csv", path_column="file name", label_column="species")
        rep = p.import_labels(csv=tmp_path / "in.csv", path_column="file name", label_column="kind")
        got = labels_by_path(p)
    assert rep.entries == 14 and rep.matched == 5 and rep.labelled == 5 and rep.decision is not None
    assert got["a/chelsea_0.jpg"] == got["a/chelsea_1.jpg"] == 'cat, "tabby"'
    assert got["b/coffee_0.jpg"] == got["b/coffee_1.jpg"] == "coffee"
    assert got["b/coffee_2.jpg"] == "two lines"                          # labels are cleaned as typed ones
    assert sum(v is not None for v in got.values()) == 5
    reasons = dict(rep.not_matched)
    assert reasons[f"line 7: {tmp_path / 'elsewhere.jpg'}"] == "outside the photo folder"
    assert reasons["line 8: ../photos/b/coffee_3.jpg"] == "outside the photo folder"
    assert reasons["line 9: b/nothing.jpg"] == "no such photo in the folder"
    assert reasons["line 10: b/broken.jpg"].startswith("skipped by the scan")
    assert "cannot be empty" in reasons["line 11: b/coins_0.jpg"]
    assert "has 1 cells" in reasons["line 12"]
    assert "NUL character" in reasons["line 13: b/\x00.jpg"] and "NUL character" in reasons["line 15: /etc/\x00"]
    assert reasons[f"line 14: {'x' * 5000}"].startswith("no such photo in the folder")
    assert rep.labels == {'cat, "tabby"': 2, "coffee": 2, "two lines": 1}


def test_csv_conflicts_are_kept_or_replaced_and_undo_is_one_step(photo_project_folder, tmp_path):
    folder = photo_project_folder
    write_csv(tmp_path / "in.csv", ["path", "label"],
              [["a/chelsea_0.jpg", "cat"], ["a/chelsea_1.jpg", "cat"], ["a/chelsea_2.jpg", "cat"],
               ["b/rocket_0.jpg", "rocket"]])
    with Project.open(folder) as p:
        p.label(["a/chelsea_0.jpg"], "kitten")          # a conflict
        p.label(["a/chelsea_1.jpg"], "cat")             # already right
        p.set_aside(["b/rocket_0.jpg"])                 # a conflict with a set-aside photo
        before = labels_by_path(p)
        decisions = p.store.decision_count()

        dry = p.import_labels(csv=tmp_path / "in.csv", dry_run=True)
        assert (dry.labelled, dry.unchanged, len(dry.conflicts), dry.decision) == (1, 1, 2, None)
        assert labels_by_path(p) == before and p.store.decision_count() == decisions

        kept = p.import_labels(csv=tmp_path / "in.csv")
        assert (kept.labelled, kept.unchanged, kept.replaced) == (1, 1, 0)
        assert [(c.path, c.existing, c.incoming) for c in kept.conflicts] == [
            ("a/chelsea_0.jpg", "kitten", "cat"), ("b/rocket_0.jpg", "(set aside)", "rocket")]
        assert labels_by_path(p)["a/chelsea_0.jpg"] == "kitten"
        assert labels_by_path(p)["a/chelsea_2.jpg"] == "cat"
        assert p.photo_info("a/chelsea_2.jpg")["state"] == "labelled"

        replaced = p.import_labels(csv=tmp_path / "in.csv", replace=True)
        assert (replaced.labelled, replaced.unchanged, replaced.replaced) == (2, 2, 2)
        now = labels_by_path(p)
        assert now["a/chelsea_0.jpg"] == "cat" and now["b/rocket_0.jpg"] == "rocket"

        from core.label_import import import_source
        assert import_source(p.store, replaced.decision) == f"CSV {tmp_path / 'in.csv'}"
        # Undo takes the whole replacing import back in one step, then the first import in one more.
        undone = p.undo()
        assert undone["kind"] == "import" and undone["photos"] == 2
        assert labels_by_path(p)["a/chelsea_0.jpg"] == "kitten"
        assert p.photo_info("b/rocket_0.jpg")["state"] == "set_aside"
        assert p.undo()["kind"] == "import"
        assert labels_by_path(p) == before


def test_csv_with_semicolons_and_a_byte_order_mark(photo_project_folder, tmp_path):
    # As a spreadsheet in a ';' locale saves "CSV UTF-8": a BOM, ';' between cells, CRLF line ends.
    with open(tmp_path / "excel.csv", "w", newline="", encoding="utf-8-sig") as f:
        w = csv.writer(f, delimiter=";")
        w.writerow(["Datei", "Klasse"])
        w.writerows([["a/camera_0.jpg", "Kamera; alt"], ["a/camera_1.jpg", "Kamera"]])
    with Project.open(photo_project_folder) as p:
        rep = p.import_labels(csv=tmp_path / "excel.csv", path_column="Datei", label_column="Klasse")
        assert rep.labelled == 2 and labels_by_path(p)["a/camera_0.jpg"] == "Kamera; alt"


def test_csv_that_cannot_be_read_is_one_line(photo_project_folder, tmp_path):
    (tmp_path / "latin1.csv").write_bytes("path,label\nb/coffee_0.jpg,caf\xe9\n".encode("latin-1"))
    (tmp_path / "empty.csv").write_text("")
    with Project.open(photo_project_folder) as p:
        for name, reason in (("missing.csv", "there is no CSV file"), ("latin1.csv", "not UTF-8"),
                             ("empty.csv", "is empty")):
            with pytest.raises(ProjectError, match=reason) as err:
                p.import_labels(csv=tmp_path / name)
            assert "\n" not in str(err.value)
        with pytest.raises(ProjectError, match="one source at a time"):
            p.import_labels(csv=tmp_path / "empty.csv", subfolders=True)
        assert p.status().labelled == 0


# ----------------------------------------------------------------------------------------- COCO
def test_coco_import_reports_several_categories(photo_project_folder, tmp_path):
    from pycocotools.coco import COCO

    coco = {"images": [{"id": 1, "file_name": "a/astronaut_0.jpg"}, {"id": 2, "file_name": "a/astronaut_1.jpg"},
                       {"id": 3, "file_name": "b/rocket_0.jpg"}, {"id": 4, "file_name": "b/rocket_1.jpg"},
                       {"id": 5, "file_name": "b/missing.jpg"}, {"id": 6, "file_name": "b/coins_0.jpg"}],
            "categories": [{"id": 7, "name": "person"}, {"id": 8, "name": "rocket"}],
            "annotations": [{"id": 1, "image_id": 1, "category_id": 7, "bbox": [0, 0, 5, 5], "area": 25, "iscrowd": 0},
                            {"id": 2, "image_id": 2, "category_id": 7, "bbox": [0, 0, 5, 5], "area": 25, "iscrowd": 0},
                            {"id": 3, "image_id": 2, "category_id": 7, "bbox": [1, 1, 5, 5], "area": 25, "iscrowd": 0},
                            {"id": 4, "image_id": 3, "category_id": 8, "bbox": [0, 0, 5, 5], "area": 25, "iscrowd": 0},
                            {"id": 5, "image_id": 4, "category_id": 7, "bbox": [0, 0, 5, 5], "area": 25, "iscrowd": 0},
                            {"id": 6, "image_id": 4, "category_id": 8, "bbox": [0, 0, 5, 5], "area": 25, "iscrowd": 0},
                            {"id": 7, "image_id": 5, "category_id": 8, "bbox": [0, 0, 5, 5], "area": 25, "iscrowd": 0}]}
    path = tmp_path / "instances.json"
    path.write_text(json.dumps(coco))
    # Outside reference: pycocotools reads the file and agrees on the categories of each image.
    ref = COCO(str(path))
    ref_cats = {ref.imgs[i]["file_name"]: sorted({ref.cats[a["category_id"]]["name"]
                                                  for a in ref.imgToAnns[i]}) for i in ref.imgs}
    with Project.open(photo_project_folder) as p:
        rep = p.import_labels(coco=path)
        got = labels_by_path(p)
    single = {f: c[0] for f, c in ref_cats.items() if len(c) == 1 and f != "b/missing.jpg"}
    assert {k: v for k, v in got.items() if v} == single == {"a/astronaut_0.jpg": "person",
                                                             "a/astronaut_1.jpg": "person",
                                                             "b/rocket_0.jpg": "rocket"}
    assert rep.several == [("b/rocket_1.jpg", sorted(ref_cats["b/rocket_1.jpg"]))] == [
        ("b/rocket_1.jpg", ["person", "rocket"])]
    assert dict(rep.not_matched) == {"b/missing.jpg": "no such photo in the folder",
                                     "b/coins_0.jpg": "no annotation gives it a category"}
    assert rep.entries == 6 and rep.labelled == 3


def test_coco_that_is_not_coco_is_one_line(photo_project_folder, tmp_path):
    (tmp_path / "bad.json").write_text("{not json")
    (tmp_path / "list.json").write_text("[1, 2]")
    with Project.open(photo_project_folder) as p:
        with pytest.raises(ProjectError, match="is not JSON"):
            p.import_labels(coco=tmp_path / "bad.json")
        with pytest.raises(ProjectError, match="no 'images' list"):
            p.import_labels(coco=tmp_path / "list.json")


# -------------------------------------------------------------------------------------- folders
def test_class_folders_match_moved_copies_by_content(photo_project_folder, tmp_path):
    folder = photo_project_folder
    tree = tmp_path / "sorted"
    (tree / "cat" / "deep" / "er").mkdir(parents=True)
    (tree / "mug").mkdir()
    # Copies under other names and depths, outside the photo folder.
    shutil.copy(folder / "a" / "chelsea_0.jpg", tree / "cat" / "IMG_0001.JPG")
    shutil.copy(folder / "a" / "chelsea_3.jpg", tree / "cat" / "deep" / "er" / "renamed.jpg")
    shutil.copy(folder / "b" / "coffee_4.jpg", tree / "mug" / "x.jpg")
    # A photo the project does not have (same picture, other bytes), a note, a file in no subfolder.
    Image.open(folder / "b" / "coffee_1.jpg").save(tree / "mug" / "re-encoded.jpg", quality=60)
    (tree / "mug" / "readme.txt").write_text("hi")
    shutil.copy(folder / "b" / "coffee_2.jpg", tree / "loose.jpg")
    (tree / ".hidden").mkdir()
    shutil.copy(folder / "b" / "coffee_3.jpg", tree / ".hidden" / "y.jpg")
    seen = []
    with Project.open(folder) as p:
        rep = p.import_labels(folders=tree, progress=lambda d, t, m: seen.append((d, t)))
        got = {k: v for k, v in labels_by_path(p).items() if v}
    assert got == {"a/chelsea_0.jpg": "cat", "a/chelsea_3.jpg": "cat", "b/coffee_4.jpg": "mug"}
    assert dict(rep.not_matched) == {"mug/re-encoded.jpg": "no photo of the project has this content",
                                     "mug/readme.txt": "not a photo (its name has no photo suffix)",
                                     "loose.jpg": "lies in no label subfolder"}
    assert rep.entries == 6 and rep.matched == 3 and seen[-1] == (4, 4)
    with Project.open(folder) as p:
        rep = p.import_labels(folders=tree, cancel=lambda: True)
        assert rep.cancelled and rep.decision is None


def test_kinfold_split_export_imports_back(photo_project_folder, tmp_path):
    # Round trip through Kinfold's own class-folder export, divided into train/val/test, photos linked.
    with Project.open(photo_project_folder) as p:
        p.import_labels(subfolders=True)
        p.label(["b/coins_2.jpg"], "coins")
        want = labels_by_path(p)
        p.export(folders=tmp_path / "out", split=(0.6, 0.2, 0.2), mode="link")
        assert sorted(x.name for x in (tmp_path / "out").iterdir() if not x.name.startswith(".")) == [
            "test", "train", "val"]
        while p.undo():
            pass
        assert p.status().labelled == 0
        rep = p.import_labels(folders=tmp_path / "out")
        assert labels_by_path(p) == want and rep.not_matched == [] and rep.labelled == 30
        # Kinfold's own CSV and COCO exports import back the same way.
        p.export(csv=tmp_path / "out.csv", coco=tmp_path / "out.json")
        for source in ({"csv": tmp_path / "out.csv"}, {"coco": tmp_path / "out.json"}):
            p.undo()
            assert p.status().labelled == 0
            rep = p.import_labels(**source)
            assert labels_by_path(p) == want and rep.not_matched == [] and rep.several == []


def test_own_subfolder_names(photo_project_folder, tmp_path):
    with Project.open(photo_project_folder) as p:
        rep = p.import_labels(subfolders=True)
        assert p.status().by_label == {"a": 15, "b": 15}
        assert rep.labelled == 30 and rep.not_matched == []
        assert rep.lines()[0].startswith("read ")


# --------------------------------------------------------------------------------- rename/merge
def test_rename_and_merge_follow_into_exports(photo_project_folder, tmp_path):
    from pycocotools.coco import COCO

    with Project.open(photo_project_folder) as p:
        p.import_labels(subfolders=True)
        p.label(["b/coins_0.jpg"], "coin")
        done = p.rename_label("a", "animals and people")
        assert (done.photos, done.merged) == (15, False)
        assert p.status().by_label == {"animals and people": 15, "b": 14, "coin": 1}
        with pytest.raises(NameQuestion) as q:
            p.rename_label("b", "Coin")                 # close to 'coin' by case: ask once
        assert q.value.near == ["coin"]
        merged = p.rename_label("b", "coin")            # merge onto the existing label
        assert (merged.photos, merged.merged) == (14, True)
        with pytest.raises(ProjectError, match="no photo carries the label 'b'"):
            p.rename_label("b", "c")
        p.export(csv=tmp_path / "out.csv", coco=tmp_path / "out.json")
        after_merge = p.status().by_label

        # Outside readers: Python's csv module (RFC 4180) and pycocotools.
        with open(tmp_path / "out.csv", newline="", encoding="utf-8") as f:
            rows = list(csv.DictReader(f))
        from collections import Counter
        assert Counter(r["label"] for r in rows) == {"animals and people": 15, "coin": 15}
        ref = COCO(str(tmp_path / "out.json"))
        names = {c["name"]: c["id"] for c in ref.loadCats(ref.getCatIds())}
        assert set(names) == {"animals and people", "coin"}
        assert len(ref.getImgIds(catIds=[names["coin"]])) == 15

        # Undo takes the merge back in one step: the 14 photos are 'b' again, coins_0 stays 'coin'.
        assert p.undo()["kind"] == "rename"
        assert p.status().by_label == {"animals and people": 15, "b": 14, "coin": 1}
        # A confirmed new name close to an existing one goes through.
        p.rename_label("b", "Coin", confirm=True)
        assert p.status().by_label == {"animals and people": 15, "Coin": 14, "coin": 1}
    assert after_merge == {"animals and people": 15, "coin": 15}


def test_rename_keeps_how_and_carries_not_this_label(photo_project_folder):
    with Project.open(photo_project_folder) as p:
        groups = p.propose(limit=3)
        g = groups[0]
        drop = g.members[-1:]
        p.accept(g.id, "thing", drop=drop)
        fp = p.photo_info(drop[0])["fingerprint"]
        assert "thing" in p.store.rejections()[fp]
        p.rename_label("thing", "object")
        assert "object" in p.store.rejections()[fp]
        kept = g.members[0]
        assert p.photo_info(kept)["label"] == "object"
        assert p.store.labels()[p.photo_info(kept)["fingerprint"]].how == "group"
        p.undo()
        assert "object" not in p.store.rejections()[fp]


# ------------------------------------------------------------------------------------------ CLI
def test_cli_import_and_rename(photo_project_folder, tmp_path):
    folder = photo_project_folder
    write_csv(tmp_path / "in.csv", ["path", "label"], [["a/chelsea_0.jpg", "cat"], ["b/nope.jpg", "x"]])
    r = kinfold("import", folder, "--csv", tmp_path / "in.csv", "--dry-run")
    assert r.returncode == 0, r.stderr
    assert r.stdout.startswith("dry run: nothing was imported")
    assert "b/nope.jpg" in r.stdout and "no such photo in the folder" in r.stdout
    r = kinfold("import", folder, "--csv", tmp_path / "in.csv", "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert out["labelled"] == 1 and out["not_matched"] == [["line 3: b/nope.jpg", "no such photo in the folder"]]
    r = kinfold("import", folder, "--subfolders")
    assert r.returncode == 0 and "conflicts    1 carry another label" in r.stdout, r.stdout

    r = kinfold("rename", folder, "b", "Cat")
    assert r.returncode == 1 and "Traceback" not in r.stderr
    assert len(r.stderr.splitlines()) == 1 and "close to the existing label 'cat'" in r.stderr
    r = kinfold("rename", folder, "b", "cat")
    assert r.returncode == 0 and "'b' merged into 'cat': 15 photos" in r.stdout, r.stdout + r.stderr
    r = kinfold("rename", folder, "a", "A", "--yes")
    assert r.returncode == 0, r.stderr
    with Project.open(folder) as p:
        assert p.status().by_label == {"A": 14, "cat": 16}

    for args, status in ((["import", folder], 2), (["import", folder, "--coco", "x.json", "--subfolders"], 2),
                         (["import", folder, "--coco", "x.json", "--label-column", "c"], 2),
                         (["import", folder, "--coco", tmp_path / "missing.json"], 1),
                         (["rename", folder, "nope", "x"], 1)):
        r = kinfold(*args)
        assert r.returncode == status and "Traceback" not in r.stderr, r.stderr
        assert len(r.stderr.splitlines()) == 1, r.stderr
