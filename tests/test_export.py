"""Tests for core.export, checked against outside readers: Python's csv module (RFC 4180),
pycocotools (COCO format) and torchvision's ImageFolder."""

import csv
import json
import os
import random
import shutil
from collections import Counter
from pathlib import Path

import pytest
from PIL import Image

from core import export
from core.export import (ExportError, LabelledPhoto, export_coco, export_csv, export_folders,
                         folder_names, safe_folder_name, stratified_split)

TIME = "2026-12-01T23:59:00Z"
AWKWARD = ["a,b", 'say "hi"', "two\nlines", "Åsa – ñandú 写真", "=SUM(A1)", "+1", "-x",
           "@cmd", "\tindented", "plain"]


def photo(path, label, burst=None, width=32, height=24):
    return LabelledPhoto(path, label, "group", "ana", TIME, width, height, burst)


def entries(folder):
    return sorted(p.name for p in Path(folder).iterdir())


# ---------------------------------------------------------------------------- CSV

def test_csv_reads_back_with_python_csv(tmp_path):
    photos = [photo(f"drawer {i}/p{i}.jpg", label) for i, label in enumerate(AWKWARD)]
    photos.append(photo("x,y/with comma.jpg", "plain"))
    out = tmp_path / "labels.csv"
    assert export_csv(out, photos) == len(photos)

    # Outside reference: Python's csv module reading with newline="" (as its docs require).
    with open(out, newline="", encoding="utf-8") as f:
        rows = list(csv.reader(f))
    assert rows[0] == ["path", "label", "how", "annotator", "time"]
    read = {row[0]: row[1] for row in rows[1:]}
    assert len(rows) == len(photos) + 1
    for p in photos:
        # Formula neutralisation (documented in export_csv): leading = + - @ tab get a quote.
        expected = "'" + p.label if p.label[0] in "=+-@\t" else p.label
        assert read[p.path] == expected
    assert read["drawer 4/p4.jpg"] == "'=SUM(A1)"
    assert read["x,y/with comma.jpg"] == "plain"
    assert [r[0] for r in rows[1:]] == sorted(p.path for p in photos)
    assert rows[1][2:] == ["group", "ana", TIME]


def test_csv_bytes_follow_rfc_4180(tmp_path):
    out = tmp_path / "labels.csv"
    export_csv(out, [photo("a.jpg", "a,b"), photo("b.jpg", 'say "hi"'), photo("c.jpg", "é")])
    raw = out.read_bytes()
    # RFC 4180 section 2: CRLF after each record, header first, fields with commas or quotes
    # enclosed in double quotes, a double quote inside escaped by doubling it.
    assert raw.startswith(b"path,label,how,annotator,time\r\n")
    assert raw.endswith(b"\r\n") and raw.count(b"\r\n") == 4
    assert b"\n" not in raw.replace(b"\r\n", b"")
    assert b'a.jpg,"a,b",group' in raw
    assert b'b.jpg,"say ""hi""",group' in raw
    assert "c.jpg,é,group".encode("utf-8") in raw  # UTF-8, no escaping


def test_csv_refuses_bad_input_and_writes_nothing(tmp_path):
    out = tmp_path / "labels.csv"
    with pytest.raises(ExportError, match="more than once: a.jpg"):
        export_csv(out, [photo("a.jpg", "x"), photo("a.jpg", "y")])
    with pytest.raises(ExportError, match="label is empty"):
        export_csv(out, [photo("a.jpg", " ")])
    with pytest.raises(ExportError, match="relative"):
        export_csv(out, [photo("../a.jpg", "x")])
    with pytest.raises(ExportError, match="does not exist"):
        export_csv(tmp_path / "nowhere" / "labels.csv", [photo("a.jpg", "x")])
    assert entries(tmp_path) == []


def test_csv_failure_mid_export_keeps_previous_file(tmp_path, monkeypatch):
    out = tmp_path / "labels.csv"
    export_csv(out, [photo("old.jpg", "old")])
    before = out.read_bytes()
    real_row, calls = export._csv_row, []

    def failing_row(p):
        calls.append(p)
        if len(calls) == 3:
            raise RuntimeError("disk gone")
        return real_row(p)

    monkeypatch.setattr(export, "_csv_row", failing_row)
    with pytest.raises(RuntimeError, match="disk gone"):
        export_csv(out, [photo(f"{i}.jpg", "new") for i in range(5)])
    assert out.read_bytes() == before
    assert entries(tmp_path) == ["labels.csv"]  # no temp file left


def test_csv_failed_replace_gives_clear_error(tmp_path, monkeypatch):
    out = tmp_path / "labels.csv"
    export_csv(out, [photo("old.jpg", "old")])
    before = out.read_bytes()

    def refuse(*args):
        raise PermissionError("read-only")

    monkeypatch.setattr(export.os, "replace", refuse)
    with pytest.raises(ExportError, match="labels.csv: read-only; nothing was changed"):
        export_csv(out, [photo("new.jpg", "new")])
    monkeypatch.undo()
    assert out.read_bytes() == before and entries(tmp_path) == ["labels.csv"]


# ---------------------------------------------------------------------------- COCO

def test_coco_loads_in_pycocotools(tmp_path):
    from pycocotools.coco import COCO

    labels = ["washer"] * 5 + ["bolt"] * 3 + ["a,b"] + ["Åsa"] * 2
    photos = [photo(f"d/{i:02d}.jpg", label, width=40 + i, height=30) for i, label in
              enumerate(labels)]
    random.Random(1).shuffle(photos)
    out = tmp_path / "coco.json"
    counts = export_coco(out, photos, description="drawers", date_created="2026-12-02T08:00:00Z")
    assert counts == {"images": 11, "annotations": 11, "categories": 4}

    # Outside reference: pycocotools builds its index from the file.
    coco = COCO(str(out))
    assert len(coco.getCatIds()) == 4
    assert len(coco.getImgIds()) == 11
    assert len(coco.getAnnIds()) == 11
    anns = coco.loadAnns(coco.getAnnIds())
    assert len(anns) == 11
    # COCO format: image-level label, so no bbox; one annotation per image.
    assert all("bbox" not in a for a in anns)
    assert all(len(coco.getAnnIds(imgIds=[i])) == 1 for i in coco.getImgIds())
    cats = coco.loadCats(coco.getCatIds())
    assert [c["name"] for c in cats] == sorted(set(labels))  # sorted by name, ids from 1
    assert [c["id"] for c in cats] == [1, 2, 3, 4]
    assert {c["supercategory"] for c in cats} == {"photo"}
    for c in cats:
        assert len(coco.getImgIds(catIds=[c["id"]])) == labels.count(c["name"])
    images = coco.loadImgs(coco.getImgIds())
    assert sorted(i["id"] for i in images) == list(range(1, 12))
    by_path = {p.path: p for p in photos}
    for img in images:
        p = by_path[img["file_name"]]
        assert (img["width"], img["height"]) == (p.width, p.height)
        [ann] = coco.loadAnns(coco.getAnnIds(imgIds=[img["id"]]))
        assert coco.loadCats(ann["category_id"])[0]["name"] == p.label
    info = coco.dataset["info"]
    assert info["description"] == "drawers" and info["year"] == 2026
    assert info["date_created"] == "2026-12-02T08:00:00Z" and "version" in info
    assert isinstance(coco.dataset["licenses"], list)


def test_coco_failure_keeps_previous_file(tmp_path, monkeypatch):
    out = tmp_path / "coco.json"
    export_coco(out, [photo("old.jpg", "old")])
    before = out.read_bytes()

    def half_dump(obj, f, **kwargs):
        f.write('{"images": [')
        raise RuntimeError("interrupted")

    monkeypatch.setattr(export.json, "dump", half_dump)
    with pytest.raises(RuntimeError, match="interrupted"):
        export_coco(out, [photo("new.jpg", "new")])
    monkeypatch.undo()
    assert out.read_bytes() == before and entries(tmp_path) == ["coco.json"]
    with pytest.raises(ExportError, match="not an ISO 8601 date"):
        export_coco(out, [photo("new.jpg", "new")], date_created="yesterday")


# ---------------------------------------------------------------------------- split

def burst_photos():
    """Three labels of 60, 30 and 12 photos; some photos come in bursts of 2 to 4."""
    rng, photos, burst = random.Random(7), [], 0
    for label, n in (("washer", 60), ("bolt", 30), ("spring", 12)):
        i = 0
        while i < n:
            size = min(rng.choice([1, 1, 1, 2, 3, 4]), n - i)
            b = None if size == 1 else (burst := burst + 1)
            photos += [photo(f"{label}/{i + k:03d}.jpg", label, b) for k in range(size)]
            i += size
    return photos


def test_split_is_stratified_and_keeps_bursts_together():
    photos = burst_photos()
    split = stratified_split(photos, (0.8, 0.1, 0.1), seed=3)
    assert sorted(p.path for ps in split.values() for p in ps) == sorted(p.path for p in photos)
    side = {p.path: name for name, ps in split.items() for p in ps}
    for b in {p.burst for p in photos if p.burst is not None}:
        assert len({side[p.path] for p in photos if p.burst == b}) == 1
    # Documented rule (stratified_split): each split within one unit (here <= 4 photos) of
    # its share of each label.
    for label, n in Counter(p.label for p in photos).items():
        for name, fraction in zip(("train", "val", "test"), (0.8, 0.1, 0.1)):
            got = sum(p.label == label for p in split[name])
            assert abs(got - fraction * n) <= 4, (label, name, got)
    assert stratified_split(photos, (0.8, 0.1, 0.1), seed=3) == split
    assert stratified_split(list(reversed(photos)), (0.8, 0.1, 0.1), seed=3) == split
    assert stratified_split(photos, (0.8, 0.1, 0.1), seed=4) != split


def test_split_small_labels_and_mixed_bursts():
    photos = [photo("one.jpg", "rare"), photo("two-a.jpg", "pair"), photo("two-b.jpg", "pair"),
              photo("m1.jpg", "x", burst=9), photo("m2.jpg", "x", burst=9),
              photo("m3.jpg", "y", burst=9)]
    split = stratified_split(photos, (0.8, 0.1, 0.1))
    # Documented rule: 1 to 3 photos of a label stay in the largest split.
    assert [p.path for p in split["train"]] == ["m1.jpg", "m2.jpg", "m3.jpg", "one.jpg",
                                                 "two-a.jpg", "two-b.jpg"]
    assert split["val"] == [] and split["test"] == []
    named = stratified_split([photo(f"{i}.jpg", "a") for i in range(10)], {"fit": 0.5, "hold": 0.5})
    assert [len(v) for v in named.values()] == [5, 5]
    for bad in [(0.5, 0.4), (1.2, -0.2), (0.25,) * 4, {"../x": 1.0}]:
        with pytest.raises(ExportError):
            stratified_split(photos, bad)


# ---------------------------------------------------------------------------- class folders

LABELS = ["a/b", "a_b", "..", "CON", "Cat", "cat", "Åsa", "ok"]


@pytest.fixture
def source(tmp_path):
    """Real PNG and JPEG photos written by Pillow, with clashing file names in one label."""
    root = tmp_path / "photos"
    photos, rng = [], random.Random(0)
    for li, label in enumerate(LABELS):
        for i in range(3 + li % 3):
            ext = "png" if i % 2 else "jpg"
            rel = f"shelf{i % 2}/{li}-{i}.{ext}"
            if label == "ok" and i < 2:
                rel = f"shelf{i}/same.png"  # same file name twice inside one class folder
            w, h = 16 + i, 12 + li
            (root / rel).parent.mkdir(parents=True, exist_ok=True)
            Image.new("RGB", (w, h), (rng.randrange(256), 20 * li, 40)).save(root / rel)
            photos.append(photo(rel, label, width=w, height=h))
    return root, photos


def image_folder_counts(root):
    from torchvision.datasets import ImageFolder

    # Outside reference: torchvision's ImageFolder reads the class-folder tree.
    ds = ImageFolder(str(root))
    image, _ = ds[0]
    assert image.size[0] > 0  # the photo decodes through the link or copy
    return {cls: n for cls, n in Counter(ds.classes[t] for t in ds.targets).items()}


def test_image_folder_loads_linked_tree(tmp_path, source):
    root, photos = source
    out = tmp_path / "out" / "set"
    out.parent.mkdir()
    counts = export_folders(out, photos, root)
    expected = Counter(p.label for p in photos)
    assert counts == dict(expected)
    names = folder_names(expected)
    assert len(set(names.values())) == len(LABELS)
    assert {names[label]: n for label, n in expected.items()} == image_folder_counts(out)
    assert all(".." not in n and "/" not in n and not n.startswith(".") for n in names.values())
    assert names["CON"] == "CON_" and names["ok"] == "ok" and names["Åsa"] == "Åsa"
    # Windows device names count with an extension too (Microsoft's file-naming rules, from
    # memory); control characters are not allowed in Windows names either.
    assert safe_folder_name("con.txt") == "con_.txt" and safe_folder_name("a\nb") == "a_b"
    files = [f for f in out.rglob("*") if f.is_file() and f.name != export.MARKER_NAME]
    assert len(files) == len(photos) and all(f.is_symlink() for f in files)
    assert sorted(f.name for f in (out / "ok").iterdir() if "same" in f.name) == sorted(
        f"{export._short_hash(p)}_{Path(p).name}" for p in ("shelf0/same.png", "shelf1/same.png"))
    assert entries(out.parent) == ["set"]  # nothing left beside it
    assert json.loads((out / export.MARKER_NAME).read_text("utf-8"))["folders"] == names


def test_image_folder_loads_split_tree_per_split(tmp_path, source):
    root, photos = source
    photos = [photo(p.path, p.label, burst=i // 2 if p.label == "Åsa" else None,
                    width=p.width, height=p.height) for i, p in enumerate(photos)]
    out = tmp_path / "set"
    counts = export_folders(out, photos, root, split=(0.6, 0.4), seed=5, mode="copy")
    expected = stratified_split(photos, (0.6, 0.4), seed=5)
    names = folder_names(p.label for p in photos)
    assert set(counts) == {"train", "val"}
    for part, members in expected.items():
        want = Counter(names[p.label] for p in members)
        assert image_folder_counts(out / part) == dict(want)
        assert counts[part] == dict(Counter(p.label for p in members))
    files = [f for f in out.rglob("*") if f.is_file() and f.name != export.MARKER_NAME]
    assert files and not any(f.is_symlink() for f in files)
    # Bursts stay on one side: find each exported copy's split by its bytes.
    side = {}
    for f in files:
        for p in photos:
            if (root / p.path).read_bytes() == f.read_bytes():
                side[p.path] = f.relative_to(out).parts[0]
    for b in {p.burst for p in photos if p.burst is not None}:
        assert len({side[p.path] for p in photos if p.burst == b}) == 1


def test_link_failure_falls_back_to_copy(tmp_path, source, monkeypatch):
    root, photos = source

    def no_links(*args, **kwargs):
        raise OSError(1, "Operation not permitted")

    monkeypatch.setattr(export.os, "symlink", no_links)
    out = tmp_path / "set"
    export_folders(out, photos, root)
    files = [f for f in out.rglob("*") if f.is_file() and f.name != export.MARKER_NAME]
    assert len(files) == len(photos) and not any(f.is_symlink() for f in files)
    assert sum(image_folder_counts(out).values()) == len(photos)


def test_refuses_foreign_folder_and_replaces_previous_export(tmp_path, source):
    root, photos = source
    foreign = tmp_path / "mine"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("keep me")
    with pytest.raises(ExportError, match="not empty and is not a previous Kinfold export"):
        export_folders(foreign, photos, root)
    assert entries(foreign) == ["notes.txt"]
    with pytest.raises(ExportError, match="inside the photo folder"):
        export_folders(root / "export", photos, root)
    with pytest.raises(ExportError, match="would be replaced"):
        export_folders(tmp_path, photos, root)

    out = tmp_path / "set"
    assert {p.label for p in photos[:3]} == {"a/b"}
    export_folders(out, photos[:3], root)
    assert folder_names(["a/b"])["a/b"] in entries(out)
    export_folders(out, photos[3:], root)  # a previous export is replaced whole
    assert folder_names(LABELS)["a/b"] not in entries(out)
    assert sum(image_folder_counts(out).values()) == len(photos) - 3
    assert sorted(entries(tmp_path)) == ["mine", "photos", "set"]


def test_failures_leave_previous_export_intact(tmp_path, source, monkeypatch):
    root, photos = source
    out = tmp_path / "set"
    export_folders(out, photos[:4], root, mode="copy")
    snapshot = sorted(str(p.relative_to(out)) for p in out.rglob("*"))

    (root / photos[5].path).unlink()
    with pytest.raises(ExportError, match=f"1 photo\\(s\\) missing .*{photos[5].path}"):
        export_folders(out, photos, root, mode="copy")
    assert sorted(str(p.relative_to(out)) for p in out.rglob("*")) == snapshot

    real_copy, calls = shutil.copy2, []

    def failing_copy(src, dst, **kwargs):
        calls.append(src)
        if len(calls) == 3:
            raise OSError(28, "No space left on device")
        return real_copy(src, dst, **kwargs)

    monkeypatch.setattr(export.shutil, "copy2", failing_copy)
    rest = [p for p in photos if p != photos[5]]
    with pytest.raises(ExportError, match="could not copy .*the disk is full"):
        export_folders(out, rest, root, mode="copy")
    assert sorted(str(p.relative_to(out)) for p in out.rglob("*")) == snapshot
    assert sorted(entries(tmp_path)) == ["photos", "set"]  # no half-written temp folder
    monkeypatch.undo()
    assert sum(image_folder_counts(out).values()) == 4


# ---------------------------------------------------------------------------- issue 17

def test_export_refuses_to_replace_the_store(photo_project_folder, tmp_path):
    from core.project import Project

    folder = photo_project_folder
    store_file = folder / ".kinfold" / "kinfold.sqlite"
    with Project.open(folder, annotator="tester") as p:
        p.label(p.photos()[:3], "cat")
        for kwargs in ({"coco": store_file}, {"csv": store_file}, {"folders": folder / ".kinfold"},
                       {"csv": folder / ".kinfold" / "new.csv"}):
            with pytest.raises(ExportError, match="inside the photo folder"):
                p.export(**kwargs)
        assert p.status().labelled == 3  # every decision is still there
    # A store kept elsewhere (--store) is protected as well.
    store = tmp_path / "elsewhere" / "store"
    with Project.open(folder, store=store, annotator="tester") as p:
        with pytest.raises(ExportError, match="inside the project store"):
            p.export_coco(store / "kinfold.sqlite")
        with pytest.raises(ExportError, match="the project store .* is inside it"):
            p.export_folders(tmp_path / "elsewhere")


def test_export_refuses_to_overwrite_a_photo(photo_project_folder):
    from core.project import Project

    photo_file = next((photo_project_folder / "a").glob("*.jpg"))
    before = photo_file.read_bytes()
    link = photo_project_folder.parent / "link-to-photo.csv"
    link.symlink_to(photo_file)  # outside the folder by name, inside it in fact
    with Project.open(photo_project_folder, annotator="tester") as p:
        p.label(p.photos()[:2], "cat")
        for dest in (photo_file, link, photo_project_folder / "a" / "labels.csv"):
            with pytest.raises(ExportError, match="inside the photo folder"):
                p.export_csv(dest, overwrite=True)
    assert photo_file.read_bytes() == before
    assert not (photo_project_folder / "a" / "labels.csv").exists()


def test_export_replaces_only_its_own_files_unless_told(tmp_path):
    photos = [photo("a.jpg", "x"), photo("b.jpg", "y")]
    mine = tmp_path / "notes.csv"
    mine.write_text("name,phone\r\nana,123\r\n")
    theirs = tmp_path / "data.json"
    theirs.write_text('{"info": {"description": "someone else"}, "images": []}')
    for dest, write in ((mine, export_csv), (theirs, export_coco), (mine, export_coco)):
        before = dest.read_bytes()
        with pytest.raises(ExportError, match="not a Kinfold export.*--overwrite"):
            write(dest, photos)
        assert dest.read_bytes() == before
    assert entries(tmp_path) == ["data.json", "notes.csv"]  # no temporary left either
    assert export_csv(mine, photos, overwrite=True) == 2   # the user said so
    assert mine.read_text().startswith("path,label")

    # Kinfold's own exports (either kind) and empty files are replaced without asking.
    csv_out, coco_out, empty = tmp_path / "l.csv", tmp_path / "l.json", tmp_path / "empty.csv"
    export_csv(csv_out, photos)
    export_coco(coco_out, photos)
    empty.touch()
    assert export_csv(csv_out, photos[:1]) == 1
    assert export_coco(coco_out, photos[:1])["images"] == 1
    assert export_csv(empty, photos) == 2
    assert export_coco(csv_out, photos)["images"] == 2  # a CSV export may become a COCO one


def test_export_recognises_its_own_files(tmp_path):
    photos = [photo("a.jpg", "x")]
    export_csv(tmp_path / "l.csv", photos)
    export_coco(tmp_path / "l.json", photos)
    assert export.is_kinfold_file(tmp_path / "l.csv") and export.is_kinfold_file(tmp_path / "l.json")
    # The same header without CRLF, or a COCO file without Kinfold's info key, is not ours.
    (tmp_path / "lf.csv").write_bytes(b"path,label,how,annotator,time\na.jpg,x,g,a,t\n")
    doc = json.loads((tmp_path / "l.json").read_text())
    del doc["info"]["kinfold_export"]
    doc["info"]["description"] = "mine"
    (tmp_path / "other.json").write_text(json.dumps(doc))
    (tmp_path / "broken.json").write_text('{"info": {"kinfold_export": 1')
    os.mkfifo(tmp_path / "fifo.csv")  # must not be opened: that would hang
    for name in ("lf.csv", "other.json", "broken.json", "fifo.csv", "missing.csv"):
        assert not export.is_kinfold_file(tmp_path / name), name
    with pytest.raises(ExportError, match="not a Kinfold export"):
        export_csv(tmp_path / "fifo.csv", photos)


def test_export_outside_the_demo_folder_still_works(demo_folder, tmp_path, monkeypatch):
    from core.project import Project

    work = tmp_path / "work"
    work.mkdir()
    monkeypatch.chdir(work)  # relative destinations, as in README's quick start
    with Project.open(demo_folder, annotator="tester") as p:
        p.label(p.photos()[:5], "washer")
        written = p.export(csv="labels.csv", coco="labels.json", folders="out", split=(0.8, 0.2))
        again = p.export(csv="labels.csv", coco="labels.json", folders="out", split=(0.8, 0.2))
    assert written == again and written["csv"] == 5
    # A split gives one COCO file per split (issue 20), named after the one asked for.
    assert sorted(entries(work)) == ["labels-train.json", "labels-val.json", "labels.csv", "out"]


def _tree(root):
    return {str(p.relative_to(root)): (p.read_bytes() if p.is_file() else None)
            for p in sorted(Path(root).rglob("*")) if p.name != export.MARKER_NAME}


def test_reexport_keeps_files_the_user_added(tmp_path, source):
    root, photos = source
    out = tmp_path / "set"
    export_folders(out, photos, root, mode="copy")
    names = folder_names(p.label for p in photos)
    ok = out / names["ok"]
    (out / "README.md").write_text("how this set was made")
    (ok / "extra-photo.png").write_bytes((root / photos[-1].path).read_bytes())
    (out / "notes" / "empty").mkdir(parents=True)
    (out / "notes" / "todo.txt").write_text("check the cats")
    (out / "shortcut").symlink_to(root)
    gone = out / names["a/b"]
    (gone / "mine.txt").write_text("kept though the label left")
    inode = (out / "README.md").stat().st_ino

    kept_labels = [p for p in photos if p.label != "a/b"]
    export_folders(out, kept_labels, root, mode="link")
    assert (out / "README.md").read_text() == "how this set was made"
    assert (out / "README.md").stat().st_ino == inode  # the user's file itself, not a copy
    assert (ok / "extra-photo.png").read_bytes() == (root / photos[-1].path).read_bytes()
    assert (out / "notes" / "empty").is_dir() and (out / "notes" / "todo.txt").exists()
    assert (out / "shortcut").is_symlink() and os.readlink(out / "shortcut") == str(root)
    assert entries(gone) == ["mine.txt"]  # Kinfold's photos of the dropped label are gone
    # Kinfold's files are exactly what its marker lists; the user's are not in it.
    marker = json.loads((out / export.MARKER_NAME).read_text("utf-8"))
    ours = {f for f in marker["files"]}
    on_disk = {str(p.relative_to(out)) for p in out.rglob("*")
               if (p.is_file() or p.is_symlink()) and p.name != export.MARKER_NAME}
    assert on_disk - ours == {"README.md", f"{names['ok']}/extra-photo.png", "notes/todo.txt",
                              "shortcut", f"{names['a/b']}/mine.txt"}
    assert all((out / f).is_symlink() for f in ours)  # this export linked; the last one copied
    assert len(ours) == len(kept_labels)
    assert sorted(entries(tmp_path)) == ["photos", "set"]  # no temporary left beside it


def test_reexport_refuses_when_a_user_file_takes_a_photos_name(tmp_path, source):
    root, photos = source
    out = tmp_path / "set"
    export_folders(out, photos[:3], root)
    names = folder_names(p.label for p in photos[:4])
    target = out / names[photos[3].label] / Path(photos[3].path).name
    target.parent.mkdir(exist_ok=True)
    target.write_text("my own file")
    before = _tree(out)
    with pytest.raises(ExportError, match="not written by Kinfold.*--overwrite"):
        export_folders(out, photos[:4], root)
    assert _tree(out) == before
    export_folders(out, photos[:4], root, overwrite=True)  # the user said so: the photo wins
    assert target.is_symlink() and target.resolve() == (root / photos[3].path).resolve()
    # A name that differs only in case is the same file on macOS and Windows: refused everywhere.
    upper = target.with_name(Path(photos[4].path).name.upper())
    upper.write_text("mine too")
    with pytest.raises(ExportError, match="not written by Kinfold"):
        export_folders(out, photos[:5], root)
    assert upper.read_text() == "mine too"


def test_export_into_a_foreign_folder_only_with_overwrite_and_keeps_its_files(tmp_path, source):
    root, photos = source
    foreign = tmp_path / "mine"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("keep me")
    with pytest.raises(ExportError, match="not a previous Kinfold export.*--overwrite"):
        export_folders(foreign, photos, root)
    export_folders(foreign, photos, root, overwrite=True)
    assert (foreign / "notes.txt").read_text() == "keep me"
    assert sum(image_folder_counts(foreign).values()) == len(photos)


def test_long_labels_fit_the_file_name_limit(tmp_path):
    root = tmp_path / "photos"
    root.mkdir()
    cjk, emoji = "字" * 86, "😀" * 64            # 258 and 256 bytes of UTF-8
    labels = [cjk, emoji, "写" * 90 + "甲", "写" * 90 + "乙",   # equal in their first 200 bytes
              "x" * 230 + "A", "X" * 230 + "b",                 # equal but for case when cut
              "é" * 150, "e\u0301" * 150]                        # NFC and NFD spellings
    long_name = "相" * 80 + ".jpg"               # 244 bytes: with a clash prefix it must be cut
    photos = []
    for i, label in enumerate(labels):
        for k in range(2):
            rel = f"d{i}-{k}/{long_name}" if i == 0 else f"d{i}/{k}.png"
            (root / rel).parent.mkdir(parents=True, exist_ok=True)
            Image.new("RGB", (8, 8), (i * 20, k * 90, 0)).save(root / rel, format="PNG")
            photos.append(photo(rel, label))
    out = tmp_path / "set"
    counts = export_folders(out, photos, root)   # ext4 here: any name over 255 bytes fails
    assert sum(counts.values()) == len(photos)
    names = folder_names(labels)
    for name in names.values():
        assert len(name.encode("utf-8")) <= 200
        assert name.encode("utf-8").decode("utf-8") == name   # cut on a character boundary
    assert names[cjk] == cjk[:66]                    # 198 bytes: whole characters only
    folded = {export._fold(n) for n in names.values()}
    assert len(folded) == len(labels)               # distinct on a case-insensitive disk too
    on_disk = [p for p in out.rglob("*") if p.name != export.MARKER_NAME]
    assert all(len(p.name.encode("utf-8")) <= 255 for p in on_disk)
    assert len(list((out / names[cjk]).iterdir())) == 2
    # Outside reference: torchvision's ImageFolder finds one class per label.
    assert sorted(image_folder_counts(out).values()) == [2] * len(labels)


def test_a_failure_in_one_format_keeps_every_previous_export(tmp_path, source, monkeypatch):
    root, photos = source
    dests = {"csv": tmp_path / "l.csv", "coco": tmp_path / "l.json", "folders": tmp_path / "set"}
    export.export_all(photos[:4], photo_folder=root, **dests)
    before = {k: (_tree(d) if d.is_dir() else d.read_bytes()) for k, d in dests.items()}

    def unchanged():
        assert {k: (_tree(d) if d.is_dir() else d.read_bytes()) for k, d in dests.items()} == before
        assert sorted(entries(tmp_path)) == ["l.csv", "l.json", "photos", "set"]

    # A failure while writing the last format, after the others were written.
    def full_disk(*args):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(export, "_place", full_disk)
    with pytest.raises(ExportError, match="the disk is full"):
        export.export_all(photos, photo_folder=root, **dests)
    monkeypatch.undo()
    unchanged()

    # A failure while putting them in place: the CSV is already replaced when the COCO fails.
    real_replace, calls = os.replace, []

    def second_replace_fails(src, dst):
        calls.append(dst)
        if len(calls) == 2:
            raise OSError(5, "Input/output error")
        return real_replace(src, dst)

    monkeypatch.setattr(export.os, "replace", second_replace_fails)
    with pytest.raises(ExportError, match="l.json: Input/output error; nothing was changed"):
        export.export_all(photos, photo_folder=root, **dests)
    monkeypatch.undo()
    assert calls[0] == dests["csv"]
    unchanged()


_KILLED_EXPORT = """
import os, signal, sys
from pathlib import Path
from core import export
from tests.test_export import photo
root, out, when = Path(sys.argv[1]), Path(sys.argv[2]), sys.argv[3]
photos = [photo(p.relative_to(root).as_posix(), p.parent.name) for p in sorted(root.rglob("*.png"))]
real_place, real_rename = export._place, os.rename
def kill(*args):
    os.kill(os.getpid(), signal.SIGKILL)
if when == "writing":                      # half the tree written
    calls = []
    def place(*args):
        calls.append(1)
        return kill() if len(calls) == 5 else real_place(*args)
    export._place = place
else:                                      # the previous export moved aside, the new one not in
    export._exchange = lambda a, b: False  # the two-rename swap of a system without an atomic exchange
    def rename(src, dst):
        real_rename(src, dst)
        if ".kinfold-old-" in str(dst):
            kill()
    export.os.rename = rename
export.export_folders(out, photos, root, mode="copy")
"""


@pytest.mark.parametrize("when", ["writing", "swapping"])
def test_killed_export_leaves_temporaries_the_next_export_removes(tmp_path, source, when):
    import subprocess
    import sys

    root, photos = source
    out = tmp_path / "set"
    export_folders(out, photos[:3], root, mode="copy")
    before = _tree(out)
    # Each photo's label is its folder name in the child; it only needs to run and be killed.
    child = subprocess.run([sys.executable, "-c", _KILLED_EXPORT, str(root), str(out), when],
                           cwd=Path(__file__).resolve().parent.parent, capture_output=True)
    assert child.returncode == -9, child.stderr.decode()
    left = [n for n in entries(tmp_path) if n not in ("photos", "set")]
    assert left and all(n.startswith(".set.kinfold-") for n in left), left

    # Another process's temporary that is still alive, and a stranger's hidden file, stay.
    alive = tmp_path / f".set.kinfold-tmp-{export._HOST}-{os.getpid()}-abcdef12"
    alive.mkdir()
    (tmp_path / ".set.tmp").write_text("not ours")
    if when == "swapping":
        assert not out.exists()  # killed between the two renames: the next run puts it back
        assert export.clean_stale_temporaries(tmp_path)
        assert _tree(out) == before
    export_folders(out, photos, root, mode="copy")
    assert sorted(entries(tmp_path)) == [alive.name, ".set.tmp", "photos", "set"]
    assert sum(image_folder_counts(out).values()) == len(photos)


def test_csv_paths_name_their_files(tmp_path):
    root = tmp_path / "photos"
    paths = ["=1+1.jpg", "+x.jpg", "-a.jpg", "@b.jpg", "=SUM(A1)/c.jpg", "plain.jpg", "a,b.jpg",
             'q"uote.jpg']
    photos = []
    for i, rel in enumerate(paths):
        (root / rel).parent.mkdir(parents=True, exist_ok=True)
        (root / rel).write_bytes(b"x")
        photos.append(LabelledPhoto(rel, "=cmd" if i % 2 else "ok", "group", "@someone" if i == 1
                                    else "ana", TIME, 4, 4))
    out = tmp_path / "labels.csv"
    export_csv(out, photos)
    # Outside reference: Python's csv module (RFC 4180 reading, newline="").
    with open(out, newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    assert [r["path"] for r in rows] == sorted(paths)
    assert all((root / r["path"]).is_file() for r in rows)    # every path names its file
    labels = {r["path"]: r["label"] for r in rows}
    assert labels["+x.jpg"] == "'=cmd" and labels["=1+1.jpg"] == "ok"  # free text is guarded
    assert {r["path"]: r["annotator"] for r in rows}["+x.jpg"] == "'@someone"
    try:
        import pandas
    except ImportError:
        return  # not installed here: the csv module's reading above is the check
    frame = pandas.read_csv(out, dtype=str, keep_default_na=False)
    assert list(frame["path"]) == sorted(paths)


@pytest.mark.parametrize("umask", [0o022, 0o027, 0o077])
def test_exports_honour_the_umask(tmp_path, source, umask):
    root, photos = source
    old = os.umask(umask)
    try:
        export.export_all(photos, csv=tmp_path / "l.csv", coco=tmp_path / "l.json",
                          folders=tmp_path / "set", photo_folder=root)
    finally:
        os.umask(old)
    files = [tmp_path / "l.csv", tmp_path / "l.json", tmp_path / "set" / export.MARKER_NAME]
    folders = [tmp_path / "set", *[p for p in (tmp_path / "set").iterdir() if p.is_dir()]]
    for f in files:
        assert oct(f.stat().st_mode & 0o777) == oct(0o666 & ~umask), f
    for d in folders:
        assert oct(d.stat().st_mode & 0o777) == oct(0o777 & ~umask), d


def test_exports_written_before_the_file_list_are_still_recognised(tmp_path, source):
    root, photos = source
    out = tmp_path / "set"
    export_folders(out, photos[:3], root)
    marker = json.loads((out / export.MARKER_NAME).read_text("utf-8"))
    del marker["files"]
    marker["kinfold_export"] = 1                  # the marker as the first exporter wrote it
    (out / export.MARKER_NAME).write_text(json.dumps(marker), "utf-8")
    (out / "README.md").write_text("mine")
    export_folders(out, photos[3:6], root)
    assert (out / "README.md").read_text() == "mine"
    assert {p.label for p in photos[3:6]} == {"a_b"}  # the same folder name as "a/b" had alone
    assert entries(out / "a_b") == sorted(Path(p.path).name for p in photos[3:6])  # old ones gone

    coco = tmp_path / "old.json"
    export_coco(coco, photos[:2])
    doc = json.loads(coco.read_text())
    del doc["info"]["kinfold_export"]              # a COCO export from before the key
    coco.write_text(json.dumps(doc))
    assert export.is_kinfold_file(coco)
    assert export_coco(coco, photos[:1])["images"] == 1


def test_reexport_removes_the_folders_kinfold_made(tmp_path, source):
    root, photos = source
    out = tmp_path / "set"
    # 3 photos of one label and 3 fractions: val and test stay empty, yet they are Kinfold's.
    export_folders(out, photos[:3], root, split=(0.8, 0.1, 0.1))
    assert entries(out) == [export.MARKER_NAME, "test", "train", "val"]
    (out / "val" / "mine.txt").write_text("kept")
    export_folders(out, photos[:3], root)
    assert entries(out) == [export.MARKER_NAME, "a_b", "val"]
    assert entries(out / "val") == ["mine.txt"]


# ---------------------------------------------------------------------------- a split in every format (issue 20)

def test_split_file_names():
    assert export.split_file_name("labels.json", "train") == Path("labels-train.json")
    assert export.split_file_name("out/labels.coco.json", "val") == Path("out/labels-val.coco.json")
    assert export.split_file_name("labels", "test") == Path("labels-test")
    assert export.split_file_name(".hidden", "test") == Path(".hidden-test")


def test_split_csv_and_coco_files_are_replaced_as_kinfold_exports(tmp_path):
    """A split CSV (its extra column) and the per-split COCO files are recognised as Kinfold's own, so
    the next export replaces them without --overwrite; both read back with csv / json."""
    from pycocotools.coco import COCO

    photos = [photo(f"p{i:02d}.jpg", "ab"[i % 2]) for i in range(20)]
    csv_path, coco_path = tmp_path / "l.csv", tmp_path / "l.json"
    for seed in (0, 1):
        written = export.export_all(photos, csv=csv_path, coco=coco_path, split=(0.6, 0.2, 0.2), seed=seed)
        assert written["csv"] == 20 and set(written["coco"]) == {"train", "val", "test"}
    assert export.is_kinfold_file(csv_path) and not coco_path.exists()
    with open(csv_path, newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    expected = export.stratified_split(photos, (0.6, 0.2, 0.2), seed=1)
    assert {r["path"]: r["split"] for r in rows} == {p.path: s for s, ps in expected.items() for p in ps}
    ids = set()
    for part, w in written["coco"].items():
        coco = COCO(w["path"])
        assert sorted(i["file_name"] for i in coco.loadImgs(coco.getImgIds())) == [p.path for p in expected[part]]
        assert w["images"] == len(expected[part]) and w["categories"] == 2
        ids.add(tuple((c["id"], c["name"]) for c in coco.loadCats(coco.getCatIds())))
    assert ids == {((1, "a"), (2, "b"))}
