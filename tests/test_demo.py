"""The demo-folder generator: determinism, a truth file that covers the folder, and the committed set.

Outside references: the truth file is read back with Python's csv module (RFC 4180); decoding,
format detection and EXIF orientation are Pillow's (ImageOps.exif_transpose follows the EXIF 2.3
Orientation tag); thumbnail correlation is plain numpy.
"""
from __future__ import annotations

import csv
import re
from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from PIL import Image, ImageFile, ImageOps

from app.demo import BROKEN, NON_IMAGE, ODD, PART_CLASSES, generate_demo, load_demo_truth

REPO = Path(__file__).resolve().parents[1]
SAMPLES, TRUTH = REPO / "sample_images", REPO / "resources" / "demo_truth.csv"
SUFFIX_FORMAT = {".jpg": "JPEG", ".png": "PNG", ".webp": "WEBP"}     # Pillow's format names


def _files(root: Path) -> set[str]:
    return {p.relative_to(root).as_posix() for p in root.rglob("*") if p.is_file()
            and not any(part.startswith(".") for part in p.relative_to(root).parts)}


def _photo_bytes(root: Path) -> set[bytes]:
    return {(root / rel).read_bytes() for rel in _files(root) if rel != "notes.txt"}


def _csv_rows(path: Path) -> list[list[str]]:
    with open(path, newline="", encoding="utf-8") as f:      # Python's csv module, RFC 4180 reader
        return list(csv.reader(f))


@pytest.fixture(autouse=True)
def strict_decoding(monkeypatch):
    # A module elsewhere could switch on Pillow's lenient decoding; these checks need the default.
    monkeypatch.setattr(ImageFile, "LOAD_TRUNCATED_IMAGES", False)


@pytest.fixture(scope="module")
def small(tmp_path_factory) -> tuple[Path, Path, dict[str, str]]:
    base = tmp_path_factory.mktemp("demo")
    truth = generate_demo(base / "a", base / "a.csv", seed=3, count=24)
    return base / "a", base / "a.csv", truth


def test_same_seed_same_bytes(small, tmp_path):
    out, truth_csv, truth = small
    again = generate_demo(tmp_path / "b", tmp_path / "b.csv", seed=3, count=24)
    assert again == truth
    assert _files(tmp_path / "b") == _files(out)
    for rel in truth:
        assert (tmp_path / "b" / rel).read_bytes() == (out / rel).read_bytes(), rel
    assert (tmp_path / "b.csv").read_bytes() == truth_csv.read_bytes()
    # and the seed matters (otherwise the check above proves nothing)
    generate_demo(tmp_path / "c", tmp_path / "c.csv", seed=4, count=24)
    assert not _photo_bytes(tmp_path / "c") & _photo_bytes(out)


def test_truth_covers_every_written_file(small):
    out, truth_csv, truth = small
    rows = _csv_rows(truth_csv)
    assert rows[0] == ["path", "class"]
    assert dict(rows[1:]) == truth == load_demo_truth(truth_csv)
    assert set(truth) == _files(out)
    counts = Counter(truth.values())
    assert counts[BROKEN] == 1 and counts[NON_IMAGE] == 1 and counts[ODD] >= 3
    assert set(counts) - {BROKEN, NON_IMAGE, ODD} == set(PART_CLASSES)
    assert not truth_csv.resolve().is_relative_to(out.resolve())


def test_refuses_to_mix_with_other_files(small, tmp_path):
    out = tmp_path / "photos"
    out.mkdir()
    (out / "holiday.jpg").write_bytes(b"someone's photo")
    with pytest.raises(FileExistsError):
        generate_demo(out, tmp_path / "t.csv", count=10)
    with pytest.raises(FileExistsError, match="does not list"):
        generate_demo(out, tmp_path / "t.csv", count=10, replace=True)
    assert (out / "holiday.jpg").read_bytes() == b"someone's photo"      # nothing was removed


def test_replace_regenerates_a_previous_demo(tmp_path):
    first = generate_demo(tmp_path / "d", tmp_path / "d.csv", seed=1, count=10)
    second = generate_demo(tmp_path / "d", tmp_path / "d.csv", seed=2, count=12, replace=True)
    assert _files(tmp_path / "d") == set(second) != set(first)


def test_bad_arguments_are_refused(tmp_path):
    with pytest.raises(ValueError, match="at least"):
        generate_demo(tmp_path / "x", tmp_path / "x.csv", count=3)
    bad = tmp_path / "bad.csv"
    bad.write_text("file,label\na.jpg,nut\n", encoding="utf-8")
    with pytest.raises(ValueError, match="path,class"):
        load_demo_truth(bad)


# ---------------------------------------------------------------- the committed set in sample_images/

@pytest.fixture(scope="module")
def committed() -> dict[str, str]:
    assert TRUTH.exists(), "render it: python -m app.demo --out sample_images --truth resources/demo_truth.csv"
    return load_demo_truth(TRUTH)


def test_committed_truth_matches_folder(committed):
    assert set(committed) == _files(SAMPLES)


def test_committed_class_counts(committed):
    counts = Counter(committed.values())
    parts = {c: n for c, n in counts.items() if c not in (ODD, BROKEN, NON_IMAGE)}
    assert len(parts) >= 8 and min(parts.values()) >= 10, parts
    assert counts[BROKEN] == 1 and counts[NON_IMAGE] == 1 and 3 <= counts[ODD] <= 5
    assert 320 <= sum(n for c, n in counts.items() if c != NON_IMAGE) <= 400


def test_committed_broken_file_fails_and_the_rest_decode(committed):
    broken = [p for p, c in committed.items() if c == BROKEN]
    assert len(broken) == 1
    with pytest.raises(OSError):                    # Pillow: "image file is truncated"
        with Image.open(SAMPLES / broken[0]) as im:
            im.load()
    formats = Counter()
    for rel, cls in committed.items():
        if cls in (BROKEN, NON_IMAGE):
            continue
        with Image.open(SAMPLES / rel) as im:       # header only: the detected format must match the suffix
            assert im.format == SUFFIX_FORMAT[Path(rel).suffix], rel
            w, h = im.size
            assert 240 <= min(w, h) and max(w, h) <= 480, (rel, im.size)
            formats[im.format] += 1
    assert formats["JPEG"] > formats["PNG"] > 0 and formats["WEBP"] > 0
    non_image = [p for p, c in committed.items() if c == NON_IMAGE]
    with pytest.raises(Image.UnidentifiedImageError):
        Image.open(SAMPLES / non_image[0])


def test_committed_exif_orientation(committed):
    tagged = []
    for rel in committed:
        if rel.endswith(".jpg") and committed[rel] != BROKEN:
            with Image.open(SAMPLES / rel) as im:
                tag = im.getexif().get(0x0112)
                if tag in (6, 8):
                    upright = ImageOps.exif_transpose(im)
                    assert upright.size == im.size[::-1]
                    tagged.append(tag)
    assert set(tagged) == {6, 8}


def test_paths_do_not_reveal_class(committed):
    words = {w for cls in (*PART_CLASSES, ODD, BROKEN, NON_IMAGE) for w in cls.split("_") if len(w) >= 3}
    folders = {Path(p).parent.as_posix() for p in committed} - {"."}
    assert len(folders) >= 2
    for rel in committed:
        low = rel.lower()
        assert not [w for w in words if w in low], rel


def _thumb(path: Path) -> np.ndarray:
    with Image.open(path) as im:
        a = np.asarray(ImageOps.exif_transpose(im).convert("L").resize((64, 48)), np.float32).ravel()
    a -= a.mean()
    return a / np.linalg.norm(a)


def test_committed_bursts_are_near_duplicates(committed):
    """Runs of consecutive file names whose thumbnails correlate strongly are bursts; they must exist
    and hold one class. The 0.75 threshold is a rule of thumb (different scenes score below 0.5 here)."""
    numbered = {}
    for rel, cls in committed.items():
        m = re.fullmatch(r"(.*?)IMG_(\d+)\.\w+", rel)
        if m and cls != BROKEN:
            numbered[(m.group(1), int(m.group(2)))] = rel
    runs, current = [], []
    for (folder, n), rel in sorted(numbered.items()):
        nxt = numbered.get((folder, n + 1))
        if nxt and float(_thumb(SAMPLES / rel) @ _thumb(SAMPLES / nxt)) > 0.75:
            current = current or [rel]
            current.append(nxt)
        elif current:
            runs.append(current)
            current = []
    assert len([r for r in runs if len(r) >= 3]) >= 3, runs
    for run in runs:
        assert len({committed[p] for p in run}) == 1, run
