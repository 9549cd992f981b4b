"""Exporting labelled photos: CSV (RFC 4180), COCO JSON, and a class-folder tree.

Every exporter writes into a temporary file or folder beside its destination and moves it
into place with ``os.replace`` only when everything has been written, so a failure leaves
neither a half-written export nor a damaged previous one.

>>> photos = [LabelledPhoto("drawer/a.jpg", "washer", "group", "ana",
...                         "2026-12-01T23:59:00Z", 640, 480)]
>>> export_csv("labels.csv", photos)                       # doctest: +SKIP
1
"""

from __future__ import annotations

import csv
import hashlib
import json
import logging
import os
import random
import re
import shutil
import tempfile
import unicodedata
from collections import Counter, defaultdict
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path, PurePosixPath
from typing import Iterator, Mapping, Sequence

log = logging.getLogger(__name__)

CSV_HEADER = ("path", "label", "how", "annotator", "time")
MARKER_NAME = ".kinfold-export.json"
SPLIT_NAMES = ("train", "val", "test")


class ExportError(Exception):
    """An export could not be written; nothing at the destination was changed."""


@dataclass(frozen=True)
class LabelledPhoto:
    path: str          # relative POSIX path inside the photo folder
    label: str
    how: str           # how it was labelled: "group", "single", "relabel", ...
    annotator: str
    time: str          # ISO 8601 UTC, e.g. "2026-12-01T23:59:00Z"
    width: int
    height: int
    burst: int | None = None   # near-duplicate burst id; one burst stays on one split side


# ---------------------------------------------------------------------------- checks

def _check_photos(photos: Sequence[LabelledPhoto]) -> list[LabelledPhoto]:
    """Refuse input that would produce an ambiguous or unsafe export."""
    photos = list(photos)
    problems = []
    for p in photos:
        parts = PurePosixPath(p.path).parts
        if (not p.path or "\\" in p.path or p.path.startswith("/")
                or any(part in ("", ".", "..") for part in parts)):
            problems.append(f"{p.path!r}: path must be relative, with '/' separators and no '..'")
        if not isinstance(p.label, str) or not p.label.strip():
            problems.append(f"{p.path!r}: label is empty")
        if not (isinstance(p.width, int) and isinstance(p.height, int)
                and p.width > 0 and p.height > 0):
            problems.append(f"{p.path!r}: width and height must be positive integers")
    twice = sorted(path for path, n in Counter(p.path for p in photos).items() if n > 1)
    if twice:
        problems.append(f"photos listed more than once: {', '.join(twice[:5])}")
    if problems:
        more = f" (and {len(problems) - 5} more)" if len(problems) > 5 else ""
        raise ExportError("Cannot export: " + "; ".join(problems[:5]) + more)
    return sorted(photos, key=lambda p: p.path)


def _check_parent(path: Path) -> None:
    if not path.parent.is_dir():
        raise ExportError(f"Cannot export to {path}: the folder {path.parent} does not exist.")


def _short_hash(text: str) -> str:
    return hashlib.sha1(text.encode("utf-8")).hexdigest()[:8]


# ---------------------------------------------------------------------------- atomic file

@contextmanager
def _atomic_text_file(path, newline: str | None = None) -> Iterator:
    """Yield a text file that replaces ``path`` only if the block finishes without error."""
    path = Path(path)
    _check_parent(path)
    if path.is_dir():
        raise ExportError(f"Cannot export to {path}: it is a folder, not a file.")
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    except OSError as e:
        raise ExportError(f"Cannot export to {path}: {e}") from e
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline=newline) as f:
            yield f
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except OSError as e:
        Path(tmp).unlink(missing_ok=True)
        raise ExportError(f"Cannot export to {path}: {e}; the previous file, if any, "
                          "is unchanged.") from e
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


# ---------------------------------------------------------------------------- CSV

_FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")


def _neutralise(cell: str) -> str:
    # Spreadsheets run a cell starting with one of these as a formula; a leading quote makes
    # them show it as text instead.
    return "'" + cell if cell.startswith(_FORMULA_STARTS) else cell


def _csv_row(photo: LabelledPhoto) -> list[str]:
    return [_neutralise(str(getattr(photo, name))) for name in CSV_HEADER]


def export_csv(path, photos: Sequence[LabelledPhoto]) -> int:
    """Write one row per photo, ``path,label,how,annotator,time``; return the rows written.

    The file follows RFC 4180: UTF-8, CRLF line ends, a header row, and cells holding commas,
    double quotes or line breaks quoted (quotes doubled). Rows are sorted by path.

    Formula neutralisation: a cell that starts with ``=``, ``+``, ``-``, ``@``, a tab or a
    carriage return would be run as a formula by a spreadsheet, so it is written with a single
    quote ``'`` in front (``=SUM(A1)`` becomes ``'=SUM(A1)``). Programs reading the CSV see that
    quote as part of the value.
    """
    photos = _check_photos(photos)
    with _atomic_text_file(path, newline="") as f:
        writer = csv.writer(f, lineterminator="\r\n", quoting=csv.QUOTE_MINIMAL)
        writer.writerow(CSV_HEADER)
        for photo in photos:
            writer.writerow(_csv_row(photo))
    return len(photos)


# ---------------------------------------------------------------------------- COCO

def _iso_utc(when) -> str:
    if when is None:
        when = datetime.now(timezone.utc)
    if isinstance(when, str):
        try:
            when = datetime.fromisoformat(when)
        except ValueError:
            raise ExportError(f"date_created {when!r} is not an ISO 8601 date") from None
    if when.tzinfo is not None:
        when = when.astimezone(timezone.utc)
    return when.replace(tzinfo=None).isoformat(timespec="seconds") + "Z"


def coco_document(photos: Sequence[LabelledPhoto], *, description: str = "Kinfold export",
                  date_created=None) -> dict:
    """The COCO dictionary: image-level classification, one annotation per photo, no boxes."""
    photos = _check_photos(photos)
    created = _iso_utc(date_created)
    labels = sorted({p.label for p in photos})
    category_id = {label: i for i, label in enumerate(labels, start=1)}
    return {
        "info": {
            "description": description,
            "version": "1.0",
            "year": int(created[:4]),
            "contributor": ", ".join(sorted({p.annotator for p in photos if p.annotator})),
            "url": "",
            "date_created": created,
        },
        "licenses": [{"id": 1, "name": "unknown", "url": ""}],
        "images": [
            {"id": i, "file_name": p.path, "width": p.width, "height": p.height, "license": 1}
            for i, p in enumerate(photos, start=1)
        ],
        "categories": [
            {"id": category_id[label], "name": label, "supercategory": "photo"}
            for label in labels
        ],
        "annotations": [
            {"id": i, "image_id": i, "category_id": category_id[p.label]}
            for i, p in enumerate(photos, start=1)
        ],
    }


def export_coco(path, photos: Sequence[LabelledPhoto], *, description: str = "Kinfold export",
                date_created=None) -> dict:
    """Write a COCO JSON file (images sorted by path, categories by name, ids from 1).

    Each photo gets one image-level annotation (``id``, ``image_id``, ``category_id``) and no
    ``bbox``: the label belongs to the whole photo. ``date_created`` is a datetime or ISO 8601
    string (default: now, UTC). Returns ``{"images": n, "annotations": n, "categories": k}``.
    """
    document = coco_document(photos, description=description, date_created=date_created)
    with _atomic_text_file(path) as f:
        json.dump(document, f, ensure_ascii=False, indent=1)
    return {key: len(document[key]) for key in ("images", "annotations", "categories")}


# ---------------------------------------------------------------------------- split

def _split_fractions(fractions) -> dict[str, float]:
    if isinstance(fractions, Mapping):
        named = {str(k): v for k, v in fractions.items()}
    else:
        fractions = list(fractions)
        if not 1 <= len(fractions) <= len(SPLIT_NAMES):
            raise ExportError(f"Give 1 to 3 split fractions (train, val, test), not {fractions}")
        named = dict(zip(SPLIT_NAMES, fractions))
    try:
        named = {k: float(v) for k, v in named.items()}
    except (TypeError, ValueError):
        raise ExportError(f"Split fractions must be numbers: {fractions}") from None
    if not named or any(v < 0 for v in named.values()) or abs(sum(named.values()) - 1) > 1e-6:
        raise ExportError(f"Split fractions must be non-negative and add up to 1: {named}")
    bad = [k for k in named if safe_folder_name(k) != k]
    if bad:
        raise ExportError(f"Split names must be plain folder names: {bad}")
    return named


def stratified_split(photos: Sequence[LabelledPhoto], fractions=(0.8, 0.1, 0.1),
                     seed: int = 0) -> dict[str, list[LabelledPhoto]]:
    """Split photos into train/val/test (or the names of a ``{name: fraction}`` mapping).

    Rule: each label is split on its own. A burst (photos sharing a ``burst`` id) moves as one
    unit and counts towards the label most of its photos carry (ties: the first label in sorted
    order); a photo without a burst is a unit of one. A label's units are shuffled with a random
    generator seeded by ``seed`` and the label, larger units placed first, and each unit goes to
    the split furthest below its share of that label's photos (ties broken by the same
    generator). So no split passes its share by a whole unit (and in 3,000 random trials none
    fell a whole unit short; checked, not proven). A label with few photos
    goes to the largest split first: a smaller split gets a photo of that label once its share
    reaches about half a photo (with 0.8/0.1/0.1, a label of 1 to 3 photos stays wholly in
    train, 4 to 6 photos put one photo in val or test, 7 or more put at least one in each).
    Same photos, fractions and seed give the same split.
    Each list is sorted by path; every split name is present, possibly empty.
    """
    named = _split_fractions(fractions)
    photos = _check_photos(photos)
    units: dict[object, list[LabelledPhoto]] = defaultdict(list)
    for p in photos:
        units[("burst", p.burst) if p.burst is not None else ("photo", p.path)].append(p)
    by_label: dict[str, list[list[LabelledPhoto]]] = defaultdict(list)
    for members in units.values():
        counts = Counter(p.label for p in members)
        top = max(counts.values())
        by_label[min(label for label, n in counts.items() if n == top)].append(members)

    result: dict[str, list[LabelledPhoto]] = {name: [] for name in named}
    for label in sorted(by_label):
        label_units = sorted(by_label[label], key=lambda u: u[0].path)
        rng = random.Random(f"{seed}\0{label}")
        rng.shuffle(label_units)
        label_units.sort(key=len, reverse=True)  # stable: equal sizes keep the shuffled order
        total = sum(len(u) for u in label_units)
        deficit = {name: f * total for name, f in named.items()}
        for unit in label_units:
            most = max(deficit.values())
            choice = rng.choice([n for n, d in deficit.items() if d > most - 1e-9])
            result[choice].extend(unit)
            deficit[choice] -= len(unit)
    return {name: sorted(members, key=lambda p: p.path) for name, members in result.items()}


# ---------------------------------------------------------------------------- class folders

_UNSAFE_CHARS = re.compile(r'[<>:"/\\|?*\x00-\x1f\x7f]')
_WINDOWS_RESERVED = {"CON", "PRN", "AUX", "NUL",
                     *(f"COM{i}" for i in range(10)), *(f"LPT{i}" for i in range(10))}
_MAX_NAME = 100  # characters; keeps well inside the common 255-byte file-name limit


def safe_folder_name(label: str) -> str:
    """A readable folder name for a label, valid on Linux, macOS and Windows.

    Path separators, characters Windows refuses and control characters become ``_``; leading
    dots and spaces and trailing dots and spaces are dropped; Windows device names (``CON``,
    ``NUL``, ``COM1`` ..., also before a dot) get ``_`` after them; long names are cut to 100
    characters.
    """
    name = _UNSAFE_CHARS.sub("_", unicodedata.normalize("NFC", label))
    name = name.lstrip(". ").rstrip(". ")[:_MAX_NAME].rstrip(". ")
    if not name:
        return "_"
    stem, dot, rest = name.partition(".")
    if stem.rstrip(" ").upper() in _WINDOWS_RESERVED:
        name = f"{stem}_{dot}{rest}"  # "con.txt" is reserved too, so mark the stem
    return name


def folder_names(labels) -> dict[str, str]:
    """Map each label to its class folder name, distinct even on case-insensitive disks.

    Labels whose safe names clash (``a/b`` and ``a_b``, or ``Cat`` and ``cat``) are told apart
    by a short hash of the label; a label that needs no change keeps its plain name if it
    sorts first among those that clash.
    """
    groups: dict[str, list[str]] = defaultdict(list)
    for label in sorted(set(labels)):
        groups[safe_folder_name(label).casefold()].append(label)
    names = {}
    for clashing in groups.values():
        unchanged = [label for label in clashing if safe_folder_name(label) == label]
        keeper = clashing[0] if len(clashing) == 1 else (unchanged or [None])[0]
        for label in clashing:
            base = safe_folder_name(label)
            hashed = f"{base[:_MAX_NAME - 9]}-{_short_hash(label)}"
            names[label] = base if label == keeper else hashed
    return names


def _file_names(photos: Sequence[LabelledPhoto]) -> dict[str, str]:
    """Each photo's file name inside its class folder; clashing names get a path-hash prefix."""
    clash = Counter(PurePosixPath(p.path).name.casefold() for p in photos)
    return {p.path: (PurePosixPath(p.path).name if clash[PurePosixPath(p.path).name.casefold()] == 1
                     else f"{_short_hash(p.path)}_{PurePosixPath(p.path).name}")
            for p in photos}


def _is_previous_export(directory: Path) -> bool:
    try:
        return json.loads((directory / MARKER_NAME).read_text("utf-8")).get("kinfold_export") == 1
    except (OSError, ValueError, AttributeError):
        return False


def _check_destination(directory: Path, source_root: Path) -> None:
    if not directory.parent.is_dir():
        raise ExportError(f"Cannot export to {directory}: the folder {directory.parent} "
                          "does not exist.")
    if directory.exists() and not directory.is_dir():
        raise ExportError(f"Cannot export to {directory}: it is a file, not a folder.")
    dest, src = directory.resolve(), source_root.resolve()
    if dest == src or src in dest.parents:
        raise ExportError(f"Cannot export to {directory}: it is inside the photo folder "
                          f"{source_root}, so the exported files would be scanned as new photos.")
    if dest in src.parents:
        raise ExportError(f"Cannot export to {directory}: the photo folder {source_root} is "
                          "inside it and would be replaced.")
    if directory.is_dir() and any(directory.iterdir()) and not _is_previous_export(directory):
        raise ExportError(f"Cannot export to {directory}: the folder is not empty and is not a "
                          "previous Kinfold export. Choose an empty or new folder.")


def _place(source: Path, target: Path, link: bool) -> bool:
    """Link (or copy) one photo; return whether linking still works."""
    if link:
        try:
            os.symlink(source, target)
            return True
        except FileExistsError:
            raise
        except (OSError, NotImplementedError) as e:
            log.warning("Symbolic links failed in %s (%s); copying the photos instead.",
                        target.parent, e)
    shutil.copy2(source, target)
    return False


def _swap_in(tmp: Path, directory: Path) -> None:
    """Move the finished tree to ``directory``; a previous export there is replaced whole."""
    if not directory.exists():
        os.replace(tmp, directory)
        return
    old = Path(tempfile.mkdtemp(prefix=f".{directory.name}.old-", dir=directory.parent))
    os.replace(directory, old / "tree")
    try:
        os.replace(tmp, directory)
    except BaseException:
        os.replace(old / "tree", directory)
        old.rmdir()
        raise
    shutil.rmtree(old, ignore_errors=True)


def export_folders(directory, photos: Sequence[LabelledPhoto], source_root, *, split=None,
                   seed: int = 0, mode: str = "link") -> dict:
    """Write ``directory/<label>/<file>``, or ``directory/<split>/<label>/<file>`` with a split.

    ``mode="link"`` makes symbolic links to the photos' absolute paths (copying instead
    wherever links fail);
    ``mode="copy"`` copies them. ``split`` is None, 1 to 3 fractions for train/val/test, or a
    ``{name: fraction}`` mapping; see :func:`stratified_split`. Label folders are named by
    :func:`folder_names`; photos whose file names clash in one folder get a short hash of their
    relative path in front. A marker file ``.kinfold-export.json`` (label → folder, counts)
    marks the folder as an export, and only an empty folder or a previous export is replaced.

    A split leaves a class folder out where it has no photos of that label (``ImageFolder``
    refuses empty class folders), so compare classes by name, not index, across splits.

    Returns photo counts per label, ``{label: n}``, or ``{split: {label: n}}`` with a split.
    """
    if mode not in ("link", "copy"):
        raise ExportError(f"mode must be 'link' or 'copy', not {mode!r}")
    directory, source_root = Path(directory), Path(source_root)
    photos = _check_photos(photos)
    parts = stratified_split(photos, split, seed) if split is not None else {None: photos}
    if not source_root.is_dir():
        raise ExportError(f"Cannot export: the photo folder {source_root} does not exist.")
    missing = [p.path for p in photos if not (source_root / p.path).is_file()]
    if missing:
        more = f" (and {len(missing) - 5} more)" if len(missing) > 5 else ""
        raise ExportError(f"Cannot export: {len(missing)} photo(s) missing from {source_root}: "
                          + ", ".join(missing[:5]) + more)
    _check_destination(directory, source_root)

    folders = folder_names(p.label for p in photos)
    counts: dict = {}
    try:
        tmp = Path(tempfile.mkdtemp(prefix=f".{directory.name}.kinfold-", dir=directory.parent))
    except OSError as e:
        raise ExportError(f"Cannot export to {directory}: {e}") from e
    try:
        link = mode == "link"
        for part, members in parts.items():
            root = tmp / part if part is not None else tmp
            root.mkdir(exist_ok=True)
            by_label: dict[str, list[LabelledPhoto]] = defaultdict(list)
            for p in members:
                by_label[p.label].append(p)
            for label, label_photos in sorted(by_label.items()):
                (root / folders[label]).mkdir()
                for path, name in _file_names(label_photos).items():
                    source = (source_root / path).resolve()
                    try:
                        link = _place(source, root / folders[label] / name, link)
                    except OSError as e:
                        raise ExportError(f"Cannot export: could not copy {path}: {e}") from e
            label_counts = {label: len(ps) for label, ps in sorted(by_label.items())}
            if part is None:
                counts = label_counts
            else:
                counts[part] = label_counts
        marker = {"kinfold_export": 1, "created": _iso_utc(None),
                  "mode": "link" if link else "copy",
                  "split": None if split is None else _split_fractions(split), "seed": seed,
                  "folders": folders, "counts": counts}
        (tmp / MARKER_NAME).write_text(json.dumps(marker, ensure_ascii=False, indent=1), "utf-8")
        _swap_in(tmp, directory)
    except OSError as e:
        shutil.rmtree(tmp, ignore_errors=True)
        raise ExportError(f"Cannot export to {directory}: {e}; the previous export, if any, "
                          "is unchanged.") from e
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return counts
