"""Exporting labelled photos: CSV (RFC 4180), COCO JSON, and a class-folder tree.

Rules every export follows (README, "The command line", says the same for users):

- All or nothing: every requested format is first written to a hidden temporary beside its
  destination, and only when all are written are they renamed into place; a failure puts back
  whatever was there before.
- Nothing replaced silently: a destination inside the photo folder or the project store is
  refused; an existing file is replaced only if it is a previous Kinfold export (recognised by
  the CSV header or the ``kinfold_export`` key of the COCO ``info`` block) or empty, unless
  ``overwrite=True``.
- Class folders keep what the user added: a previous folder export lists the files Kinfold wrote
  in its marker ``.kinfold-export.json``; a new export replaces exactly those and keeps every
  other file and folder (as hard links, or copies where links fail). A kept file that a new
  photo would take the name of is refused unless ``overwrite=True``.
- Temporaries are named ``.<name>.kinfold-tmp-<host>-<pid>-<random>`` (and ``-old-`` for a
  previous export moved aside while the new one is put in place). Each export first removes the
  stale ones beside its destinations: those whose writing process is dead (another machine's: a
  day old); a stale ``-old-`` whose destination is missing is put back instead.
- A crash never leaves a destination missing or half written: a file is replaced by one rename
  (the previous one hard-linked aside first), a class-folder tree by one atomic exchange where
  the system has it (Linux: ``renameat2``), else by two renames whose gap the next export closes
  (the ``-old-`` rule above). Separate destinations cannot change in one step, though: a crash
  while several formats are being put in place (a few milliseconds) can leave some formats new
  and the rest from the previous export, each whole; the next export writes them all again.
- Files and folders are created with the process umask.

>>> photos = [LabelledPhoto("drawer/a.jpg", "washer", "group", "ana",
...                         "2026-12-01T23:59:00Z", 640, 480)]
>>> export_csv("labels.csv", photos)                       # doctest: +SKIP
1
"""

from __future__ import annotations

import csv
import errno
import hashlib
import json
import logging
import math
import os
import random
import re
import secrets
import shutil
import socket
import stat
import time
import unicodedata
from collections import Counter, defaultdict
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path, PurePosixPath
from typing import Mapping, Sequence

log = logging.getLogger(__name__)

CSV_HEADER = ("path", "label", "how", "annotator", "time")
CSV_SPLIT_HEADER = CSV_HEADER + ("split",)     # the header when a split is asked
# Why class folders hold links unless copies are asked for: shown by the CLI, the export dialog and
# the README, so the choice is made knowing what each means.
WHY_LINKS = ("Links are the default because the export then takes no extra disk space, is written in "
             "seconds and leaves the photos where they are; choose copies to move the set to another "
             "machine, or to keep it when the originals move or are deleted.")
MARKER_NAME = ".kinfold-export.json"
MARKER_VERSION = 2           # 2: the marker lists the files and folders Kinfold wrote
SPLIT_NAMES = ("train", "val", "test")
_NAME_BYTES = 255            # the file-name limit of ext4, APFS, NTFS (UTF-16 units <= UTF-8 bytes)
_MAX_FOLDER_BYTES = 200      # class folder names, hash suffix included: leaves room on every disk
_FOREIGN_STALE_SECONDS = 86400


class ExportError(Exception):
    """An export could not be written; nothing at the destination was changed."""


class ExportRefused(ExportError):
    """The export would replace what Kinfold did not write; ``overwrite=True`` goes ahead. ``reason`` is
    the refusal without the advice on the command line's flag; ``offer`` names the explicit choice
    (what ``overwrite=True`` does here), for a button."""

    def __init__(self, message: str, reason: str, offer: str):
        super().__init__(message)
        self.reason, self.offer = reason, offer


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


def _short_hash(text: str, n: int = 8) -> str:
    return hashlib.sha1(text.encode("utf-8")).hexdigest()[:n]


def _reason(e: OSError) -> str:
    """An OS error as a reason with what to do about it."""
    if e.errno == errno.ENOSPC or e.errno == getattr(errno, "EDQUOT", None):
        return "the disk is full; free some space and export again"
    if e.errno in (errno.EACCES, errno.EPERM, errno.EROFS):
        return f"{(e.strerror or 'not allowed').lower()}; choose a folder you can write to"
    if e.errno == errno.ENAMETOOLONG:
        return "a file name is too long for this disk; choose a shorter destination"
    return e.strerror or str(e)


# ---------------------------------------------------------------------------- names

def _cut_bytes(text: str, limit: int) -> str:
    """``text`` cut to at most ``limit`` bytes of UTF-8, on a character boundary."""
    return text.encode("utf-8")[:limit].decode("utf-8", "ignore")


def _fold(name: str) -> str:
    """The key under which a case-insensitive disk (NTFS, APFS, HFS+) sees two names as one."""
    return unicodedata.normalize("NFC", unicodedata.normalize("NFC", name).casefold())


_UNSAFE_CHARS = re.compile(r'[<>:"/\\|?*\x00-\x1f\x7f]')
_WINDOWS_RESERVED = {"CON", "PRN", "AUX", "NUL",
                     *(f"COM{i}" for i in range(10)), *(f"LPT{i}" for i in range(10))}


def _tidy(name: str) -> str:
    return name.lstrip(". ").rstrip(". ")


def safe_folder_name(label: str, limit: int = _MAX_FOLDER_BYTES) -> str:
    """A readable folder name for a label, valid on Linux, macOS and Windows.

    Path separators, characters Windows refuses and control characters become ``_``; leading
    dots and spaces and trailing dots and spaces are dropped; Windows device names (``CON``,
    ``NUL``, ``COM1`` ..., also before a dot) get ``_`` after them; long names are cut to
    ``limit`` bytes of UTF-8 (200) on a character boundary, well inside the 255-byte limit.
    """
    name = _tidy(_UNSAFE_CHARS.sub("_", unicodedata.normalize("NFC", label)))
    name = _tidy(_cut_bytes(name, limit - 1))  # 1 byte spare for the device-name mark
    if not name:
        return "_"
    stem, dot, rest = name.partition(".")
    if stem.rstrip(" ").upper() in _WINDOWS_RESERVED:
        name = f"{stem}_{dot}{rest}"  # "con.txt" is reserved too, so mark the stem
    return name


def folder_names(labels) -> dict[str, str]:
    """Map each label to its class folder name, distinct even on case-insensitive disks.

    Labels whose safe names clash (``a/b`` and ``a_b``, ``Cat`` and ``cat``, or two long labels
    that agree in their first 200 bytes) are told apart by a short hash of the label; a label
    that needs no change keeps its plain name if it sorts first among those that clash. Every
    name is at most 200 bytes of UTF-8.
    """
    groups: dict[str, list[str]] = defaultdict(list)
    for label in sorted(set(labels)):
        groups[_fold(safe_folder_name(label))].append(label)
    names, hashed = {}, []
    for clashing in groups.values():
        unchanged = [label for label in clashing if safe_folder_name(label) == label]
        keeper = clashing[0] if len(clashing) == 1 else (unchanged or [None])[0]
        for label in clashing:
            if label == keeper:
                names[label] = safe_folder_name(label)
            else:
                hashed.append(label)
    taken = {_fold(n) for n in names.values()}
    for label in hashed:
        for n in (8, 16, 40):  # a longer hash on the (unlikely) clash with another name
            suffix = f"-{_short_hash(label, n)}"
            name = safe_folder_name(label, _MAX_FOLDER_BYTES - len(suffix)) + suffix
            if _fold(name) not in taken:
                break
        else:
            raise ExportError(f"Cannot export: no distinct folder name for label {label!r}")
        names[label] = name
        taken.add(_fold(name))
    return names


def _fit_file_name(name: str, prefix: str = "") -> str:
    """``prefix + name``, its stem cut so it fits the 255-byte name limit (suffix kept)."""
    if len((prefix + name).encode("utf-8")) <= _NAME_BYTES:
        return prefix + name
    p = PurePosixPath(name)
    suffix = p.suffix if len(p.suffix.encode("utf-8")) <= 16 else ""
    stem = name[: len(name) - len(suffix)]
    room = _NAME_BYTES - len(prefix.encode("utf-8")) - len(suffix.encode("utf-8")) - 9
    return f"{prefix}{_cut_bytes(stem, room)}-{_short_hash(name)}{suffix}"


def _file_names(photos: Sequence[LabelledPhoto]) -> dict[str, str]:
    """Each photo's file name inside its class folder; clashing names get a path-hash prefix."""
    base = {p.path: PurePosixPath(p.path).name for p in photos}
    clash = Counter(_fold(name) for name in base.values())
    return {path: (_fit_file_name(name) if clash[_fold(name)] == 1
                   else _fit_file_name(name, f"{_short_hash(path)}_"))
            for path, name in base.items()}


# ---------------------------------------------------------------------------- temporaries

_HOST = _short_hash(socket.gethostname())
_TEMP_RE = re.compile(r"\.kinfold-(tmp|old|oldcut)-([0-9a-f]{8})-(\d+)-[0-9a-z]{8}$")


def _temp_path(dest: Path, kind: str) -> Path:
    """A fresh hidden name beside ``dest`` that says whose it is: ``.<name>.kinfold-<kind>-...``.
    ``oldcut`` marks a previous export moved aside whose name had to be cut to fit."""
    tail = f".kinfold-{kind}-{_HOST}-{os.getpid()}-{secrets.token_hex(4)}"
    room = _NAME_BYTES - 1 - len(tail) - 3  # 3: "cut" if the kind must say so
    name = _cut_bytes(dest.name, room)
    if kind == "old" and name != dest.name:
        tail = tail.replace("-old-", "-oldcut-", 1)
    return dest.parent / f".{name}{tail}"


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OSError, OverflowError):
        return True  # someone else's process, or we cannot tell: not ours to remove
    return True


def _remove(path: Path) -> None:
    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path, ignore_errors=True)
    else:
        try:
            path.unlink()
        except FileNotFoundError:
            pass


def clean_stale_temporaries(folder) -> list[str]:
    """Remove Kinfold's stale export temporaries in ``folder`` (see the module rules); put back a
    previous export a killed export had moved aside. Returns the names it removed or restored."""
    folder, done = Path(folder), []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return done
    for entry in entries:
        m = _TEMP_RE.search(entry.name)
        if not m or not entry.name.startswith("."):
            continue
        kind, host, pid = m[1], m[2], int(m[3])
        try:
            age = time.time() - entry.stat(follow_symlinks=False).st_mtime
        except OSError:
            continue
        stale = (not _pid_alive(pid)) if host == _HOST else age > _FOREIGN_STALE_SECONDS
        if not stale:
            continue
        path = Path(entry.path)
        if kind == "tmp":
            _remove(path)
        elif kind == "oldcut":
            log.warning("Left %s in place: an earlier export was interrupted and its full name "
                        "is not known; rename it back by hand if it is missing.", path)
            continue
        else:
            dest = folder / entry.name[1:m.start()]
            try:
                if os.path.lexists(dest):
                    _remove(path)          # the new export was put in place: this is the old one
                else:
                    os.rename(path, dest)  # killed between moving the old one aside and the new in
            except OSError as e:
                log.warning("Could not clean up %s: %s", path, e)
                continue
        done.append(entry.name)
    return done


def _new_temp_file(dest: Path) -> Path:
    path = _temp_path(dest, "tmp")
    os.close(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666))  # mode & ~umask
    return path


def _new_temp_dir(dest: Path) -> Path:
    path = _temp_path(dest, "tmp")
    os.mkdir(path, 0o777)  # mode & ~umask
    return path


# ---------------------------------------------------------------------------- recognising our own

_CSV_HEADER_LINE = (",".join(CSV_HEADER) + "\r\n").encode("ascii")
_CSV_SPLIT_HEADER_LINE = (",".join(CSV_SPLIT_HEADER) + "\r\n").encode("ascii")
_COCO_KEYS = {"info", "licenses", "images", "categories", "annotations"}


def is_kinfold_file(path) -> bool:
    """Whether ``path`` is a regular file holding a previous Kinfold CSV or COCO export, or
    nothing at all (an empty file has nothing to lose)."""
    try:
        st = os.stat(path)
        if not stat.S_ISREG(st.st_mode):
            return False
        if st.st_size == 0:
            return True
        with open(path, "rb") as f:
            head = f.read(len(_CSV_SPLIT_HEADER_LINE))
            if head.startswith(_CSV_HEADER_LINE) or head == _CSV_SPLIT_HEADER_LINE:
                return True
            if not head.lstrip().startswith(b"{"):
                return False
            f.seek(0)
            doc = json.load(f)
    except (OSError, ValueError):
        return False
    info = doc.get("info") if isinstance(doc, dict) else None
    if not isinstance(info, dict):
        return False
    # Exports written before the explicit key said only this in their description.
    legacy = info.get("description") == "Kinfold export" and set(doc) == _COCO_KEYS
    return info.get("kinfold_export") == 1 or legacy


def _previous_export_files(directory: Path) -> set[str] | None:
    """What a previous Kinfold folder export wrote into ``directory``, from its marker: relative
    POSIX paths of its files, and of its folders with a trailing ``/``; None if not an export."""
    try:
        marker = json.loads((directory / MARKER_NAME).read_text("utf-8"))
        version = marker.get("kinfold_export")
        if version == MARKER_VERSION:
            return ({str(f) for f in marker["files"]} | {f"{d}/" for d in marker.get("dirs", [])}
                    | {MARKER_NAME})
        if version == 1:
            # Written before the marker listed its files: the class folders' files were ours.
            ours = {MARKER_NAME}
            for part in list(marker.get("split") or {}) or [None]:
                ours.add(f"{part}/" if part else "")
                for name in marker["folders"].values():
                    rel = f"{part}/{name}" if part else str(name)
                    ours.add(f"{rel}/")
                    if (directory / rel).is_dir():
                        with os.scandir(directory / rel) as it:
                            ours |= {f"{rel}/{e.name}" for e in it if not e.is_dir(follow_symlinks=False)}
            return ours - {""}
    except (OSError, ValueError, AttributeError, KeyError, TypeError):
        pass
    return None


# ---------------------------------------------------------------------------- CSV

_FORMULA_STARTS = ("=", "+", "-", "@", "\t", "\r")
_FREE_TEXT = ("label", "annotator")  # typed by people; path, how and time are written unchanged


def _neutralise(cell: str) -> str:
    # Spreadsheets run a cell starting with one of these as a formula; a leading quote makes
    # them show it as text instead.
    return "'" + cell if cell.startswith(_FORMULA_STARTS) else cell


def _csv_row(photo: LabelledPhoto) -> list[str]:
    return [_neutralise(str(getattr(photo, name))) if name in _FREE_TEXT
            else str(getattr(photo, name)) for name in CSV_HEADER]


def _write_csv(tmp: Path, photos: list[LabelledPhoto], split_of: dict[str, str] | None = None) -> int:
    """``split_of``: photo path -> split name, written in a last ``split`` column."""
    with open(tmp, "w", encoding="utf-8", newline="") as f:
        writer = csv.writer(f, lineterminator="\r\n", quoting=csv.QUOTE_MINIMAL)
        writer.writerow(CSV_HEADER if split_of is None else CSV_SPLIT_HEADER)
        for photo in photos:
            writer.writerow(_csv_row(photo) + ([] if split_of is None else [split_of[photo.path]]))
        f.flush()
        os.fsync(f.fileno())
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
                  date_created=None, labels=None) -> dict:
    """The COCO dictionary: image-level classification, one annotation per photo, no boxes.
    ``labels``: the categories to list (default: the photos' labels); the files of one split give
    every label, so a category id means the same in each."""
    photos = _check_photos(photos)
    created = _iso_utc(date_created)
    labels = sorted({p.label for p in photos} | set(labels or ()))
    category_id = {label: i for i, label in enumerate(labels, start=1)}
    return {
        "info": {
            "description": description,
            "version": "1.0",
            "year": int(created[:4]),
            "contributor": ", ".join(sorted({p.annotator for p in photos if p.annotator})),
            "url": "",
            "date_created": created,
            "kinfold_export": 1,  # how a later export knows it may replace this file
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


def _write_coco(tmp: Path, document: dict) -> dict:
    with open(tmp, "w", encoding="utf-8") as f:
        json.dump(document, f, ensure_ascii=False, indent=1)
        f.flush()
        os.fsync(f.fileno())
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
    except (TypeError, ValueError, OverflowError):
        raise ExportError(f"Split fractions must be numbers: {fractions}") from None
    if not all(math.isfinite(v) for v in named.values()):
        raise ExportError(f"Split fractions must be finite numbers: {fractions}")
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

def _folder_plan(photos: list[LabelledPhoto], split, seed: int):
    """What a folder export writes: its label folders, ``{file: photo path}`` and sub-folders
    (relative POSIX paths), and the photo counts."""
    parts = stratified_split(photos, split, seed) if split is not None else {None: photos}
    folders = folder_names(p.label for p in photos)
    files: dict[str, str] = {}
    dirs: set[str] = set()
    counts: dict = {}
    for part, members in parts.items():
        by_label: dict[str, list[LabelledPhoto]] = defaultdict(list)
        for p in members:
            by_label[p.label].append(p)
        if part is not None:
            dirs.add(part)
        for label, label_photos in sorted(by_label.items()):
            rel_dir = f"{part}/{folders[label]}" if part is not None else folders[label]
            dirs.add(rel_dir)
            for path, name in _file_names(label_photos).items():
                files[f"{rel_dir}/{name}"] = path
        label_counts = {label: len(ps) for label, ps in sorted(by_label.items())}
        if part is None:
            counts = label_counts
        else:
            counts[part] = label_counts
    return folders, files, dirs, counts


def _kept_entries(directory: Path, ours: set[str]) -> dict[str, str]:
    """What a destination folder holds that Kinfold did not write: ``{relative path: kind}``,
    kind ``dir``, ``link``, ``file`` or ``other``. Folders that only held Kinfold's files are
    not listed (they come back only if something kept is inside)."""
    our_dirs = ({str(a) for f in ours for a in PurePosixPath(f).parents if str(a) != "."}
                | {d.rstrip("/") for d in ours if d.endswith("/")})
    kept: dict[str, str] = {}

    def fail(e: OSError):
        raise e

    for root, dirnames, filenames in os.walk(directory, onerror=fail):
        rel_root = PurePosixPath(Path(root).relative_to(directory).as_posix())
        for name in dirnames + filenames:
            rel, path = (rel_root / name).as_posix(), os.path.join(root, name)
            if rel in ours:
                continue
            st = os.lstat(path)
            if stat.S_ISLNK(st.st_mode):
                kept[rel] = "link"
            elif stat.S_ISDIR(st.st_mode):
                if rel not in our_dirs:
                    kept[rel] = "dir"
            else:
                kept[rel] = "file" if stat.S_ISREG(st.st_mode) else "other"
    return kept


def _place_kept(directory: Path, tmp: Path, kept: dict[str, str]) -> None:
    """Put the kept entries into the new tree: hard links (copies where links fail), so the
    previous tree can be removed whole once the new one is in place."""
    for rel, kind in sorted(kept.items()):
        src, dst = directory / rel, tmp / rel
        dst.parent.mkdir(parents=True, exist_ok=True)
        if kind == "dir":
            dst.mkdir(exist_ok=True)
        elif kind == "link":
            os.symlink(os.readlink(src), dst)
        else:
            try:
                os.link(src, dst, follow_symlinks=False)
            except OSError:
                if kind != "file":
                    raise ExportError(f"Cannot export to {directory}: {rel} is neither a file nor "
                                      "a folder and cannot be kept; move it out first.") from None
                shutil.copy2(src, dst)


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


def _write_folders(tmp: Path, plan, source_root: Path, mode: str, split, seed: int) -> str:
    folders, files, dirs, counts = plan
    for rel in sorted(dirs):
        (tmp / rel).mkdir(parents=True, exist_ok=True)
    link = mode == "link"
    for rel, path in files.items():
        try:
            link = _place((source_root / path).resolve(), tmp / rel, link)
        except OSError as e:
            raise ExportError(f"Cannot export: could not copy {path}: {_reason(e)}; "
                              "nothing was changed.") from e
    marker = {"kinfold_export": MARKER_VERSION, "created": _iso_utc(None),
              "mode": "link" if link else "copy",
              "split": None if split is None else _split_fractions(split), "seed": seed,
              "folders": folders, "counts": counts, "files": sorted(files), "dirs": sorted(dirs)}
    (tmp / MARKER_NAME).write_text(json.dumps(marker, ensure_ascii=False, indent=1), "utf-8")
    return marker["mode"]


# ---------------------------------------------------------------------------- destinations

def _absolute(path) -> Path:
    """An absolute path whose folders are resolved; a link at the last step stays a link."""
    p = Path(os.path.abspath(os.path.expanduser(os.fspath(path))))
    return p.parent.resolve() / p.name if p.name else p


def _check_destinations(dests: dict[str, Path], protected: list[tuple[Path, str]],
                        overwrite: bool) -> None:
    items = list(dests.items())
    for i, (k1, d1) in enumerate(items):
        for k2, d2 in items[i + 1:]:
            if d1 == d2 or d1 in d2.parents or d2 in d1.parents:
                raise ExportError(f"Cannot export {k1} to {d1} and {k2} to {d2}: give each its "
                                  "own destination, neither inside the other.")
    for kind, dest in dests.items():
        if not dest.name:
            raise ExportError(f"Cannot export to {dest}: give a file or folder name.")
        parent = dest.parent
        if not parent.is_dir():
            blocker = next((a for a in parent.parents if a.exists() and not a.is_dir()), None)
            if parent.exists() or blocker is not None:
                raise ExportError(f"Cannot export to {dest}: {blocker or parent} is a file, not a "
                                  "folder; choose a destination inside a folder.")
            raise ExportError(f"Cannot export to {dest}: the folder {parent} does not exist; "
                              "create it first or choose another destination.")
        real = dest.resolve()
        for root, what in protected:
            root = root.resolve()
            if any(d == root or root in d.parents for d in (dest, real)):
                raise ExportError(f"Cannot export to {dest}: it is inside {what} {root}; "
                                  "choose a destination outside it.")
            if kind == "folders" and dest in root.parents:
                raise ExportError(f"Cannot export to {dest}: {what} {root} is inside it and would "
                                  "be replaced; choose another folder.")
    for kind, dest in dests.items():
        if kind == "folders":
            if dest.is_symlink() or (dest.exists() and not dest.is_dir()):
                raise ExportError(f"Cannot export class folders to {dest}: it is a "
                                  f"{'link' if dest.is_symlink() else 'file'}, not a folder; "
                                  "choose a folder.")
        elif dest.is_dir():
            raise ExportError(f"Cannot export to {dest}: it is a folder, not a file; give a "
                              "file name.")
        elif os.path.lexists(dest) and not overwrite and not is_kinfold_file(dest):
            reason = f"Cannot export to {dest}: the file exists and is not a Kinfold export"
            raise ExportRefused(f"{reason}; choose another name, or overwrite it (--overwrite, "
                                "overwrite=True).", reason, f"Replace {dest.name}")


def _folder_keeps(dest: Path, plan, overwrite: bool) -> dict[str, str]:
    """What of an existing class-folder destination the new export keeps (see module rules)."""
    if not dest.is_dir():
        return {}
    with os.scandir(dest) as it:
        if not any(True for _ in it):
            return {}
    ours = _previous_export_files(dest)
    if ours is None and not overwrite:
        reason = f"Cannot export to {dest}: the folder is not empty and is not a previous Kinfold export"
        raise ExportRefused(f"{reason}; choose an empty or new folder, or write into it (--overwrite, "
                            "overwrite=True: its files are kept unless a photo takes their name).",
                            reason, f"Write into {dest.name} (its files are kept unless a photo takes their name)")
    kept = _kept_entries(dest, ours or set())
    _, files, dirs, _ = plan
    # Compared as a case-insensitive disk would, so the rule is the same on every disk.
    new = {_fold(MARKER_NAME): "file", **{_fold(f): "file" for f in files},
           **{_fold(d): "dir" for d in dirs}}
    clashes = [rel for rel, kind in kept.items()
               if _fold(rel) in new and not (kind == new[_fold(rel)] == "dir")]
    if clashes and not overwrite:
        more = f" (and {len(clashes) - 3} more)" if len(clashes) > 3 else ""
        reason = (f"Cannot export to {dest}: {', '.join(sorted(clashes)[:3])}{more} were not written by "
                  "Kinfold, and labelled photos would take their names")
        raise ExportRefused(f"{reason}; move them away, or replace them (--overwrite, overwrite=True).",
                            reason, "Replace " + ("that file" if len(clashes) == 1 else f"those {len(clashes)} files"))
    lost = set(clashes)  # overwrite: the export wins, and nothing kept stays inside a lost one
    return {k: v for k, v in kept.items()
            if k not in lost and not any(str(a) in lost for a in PurePosixPath(k).parents)}


# ---------------------------------------------------------------------------- all or nothing

@dataclass
class _Target:
    dest: Path
    tmp: Path
    is_dir: bool
    old: Path | None = None      # the previous export, moved aside (or hard-linked) until done
    placed: bool = False


def _exchange_call():
    """libc's renameat2 where it exists (Linux, glibc 2.28+), else None."""
    try:
        import ctypes

        fn = ctypes.CDLL(None, use_errno=True).renameat2
    except (OSError, AttributeError, ImportError):
        return None
    fn.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    fn.restype = ctypes.c_int
    return fn


_RENAMEAT2 = _exchange_call()
_AT_FDCWD, _RENAME_EXCHANGE = -100, 2


def _exchange(a: Path, b: Path) -> bool:
    """Swap two existing paths in one step (so a killed export never leaves the class folders
    missing); False where the system or the disk cannot, and the caller swaps by two renames."""
    if _RENAMEAT2 is None:
        return False
    if _RENAMEAT2(_AT_FDCWD, os.fsencode(a), _AT_FDCWD, os.fsencode(b), _RENAME_EXCHANGE) == 0:
        return True
    import ctypes

    err = ctypes.get_errno()
    if err in (errno.ENOSYS, errno.EINVAL, errno.EOPNOTSUPP, getattr(errno, "ENOTSUP", errno.EOPNOTSUPP)):
        return False
    raise OSError(err, os.strerror(err), os.fspath(b))


def _commit(targets: list[_Target]) -> None:
    """Put every finished temporary in place; on any failure put every destination back."""
    t = None
    try:
        for t in targets:
            if t.is_dir and os.path.isdir(t.dest) and not os.path.islink(t.dest) and _exchange(t.tmp, t.dest):
                t.old = t.tmp     # the previous tree now has the temporary's name (removed below,
                t.placed = True   # or as a stale temporary if this process is killed first)
                continue
            if os.path.lexists(t.dest):
                old = _temp_path(t.dest, "old")
                if t.is_dir or os.path.islink(t.dest):
                    os.rename(t.dest, old)
                else:
                    try:  # a hard link keeps the file in place until os.replace swaps it
                        os.link(t.dest, old, follow_symlinks=False)
                    except OSError:
                        os.rename(t.dest, old)
                t.old = old
            os.replace(t.tmp, t.dest)
            t.placed = True
    except BaseException as e:
        for other in reversed(targets):
            _roll_back(other)
        if isinstance(e, OSError):
            raise ExportError(f"Cannot export to {t.dest}: {_reason(e)}; nothing was "
                              "changed.") from e
        raise
    for t in targets:
        if t.old is not None:
            _remove(t.old)
    for parent in {t.dest.parent for t in targets}:
        try:  # make the renames durable
            fd = os.open(parent, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
        except OSError:
            pass


def _roll_back(t: _Target) -> None:
    try:
        if t.placed:
            if t.old is None:
                _remove(t.dest)
            elif t.is_dir and _exchange(t.old, t.dest):
                _remove(t.old)
            elif t.is_dir:
                junk = _temp_path(t.dest, "tmp")
                os.rename(t.dest, junk)
                os.rename(t.old, t.dest)
                _remove(junk)
            else:
                os.replace(t.old, t.dest)
        else:
            _remove(t.tmp)
            if t.old is not None:
                if os.path.lexists(t.dest):
                    _remove(t.old)       # a hard link: the file never left
                else:
                    os.rename(t.old, t.dest)
    except OSError as e:
        log.error("Could not put back %s (%s); the previous version is at %s", t.dest, e, t.old)


def export_all(photos: Sequence[LabelledPhoto], *, csv=None, coco=None, folders=None,
               photo_folder=None, store=None, split=None, seed: int = 0, mode: str = "link",
               overwrite: bool = False, description: str = "Kinfold export",
               date_created=None) -> dict:
    """Write every requested format, all or nothing (see the module rules).

    ``csv`` and ``coco`` are file paths, ``folders`` a folder (``photo_folder`` is then needed:
    the photos are linked or copied from it); ``split``, ``seed`` and ``mode`` as in
    :func:`export_folders`. ``photo_folder`` and ``store`` are protected: nothing is written
    inside them. Returns, for the formats asked, ``{"csv": rows, "coco": {"images": n,
    "annotations": n, "categories": k}, "folders": counts}``.

    With a ``split``, one split serves every format asked: the CSV gets a last ``split`` column,
    COCO becomes one file per split named by :func:`split_file_name` (``labels.json`` ->
    ``labels-train.json``, ...; every file lists every label, so category ids agree), returned
    as ``"coco": {split: {"path": ..., "images": n, ...}}``, and folders get a level per split.
    """
    photos = _check_photos(photos)
    asked = {}
    for kind, value in (("csv", csv), ("coco", coco), ("folders", folders)):
        if value is not None:
            if not os.fspath(value).strip():
                raise ExportError(f"Cannot export {kind}: the destination is empty; give a path.")
            asked[kind] = _absolute(value)
    if not asked:
        raise ExportError("Say what to export: a CSV file, a COCO file and/or class folders.")
    split_of = None
    if split is not None:
        # One split for every format: the CSV's split column, one COCO file per split, the folders.
        parts = stratified_split(photos, split, seed)
        split_of = {p.path: name for name, members in parts.items() for p in members}
        if "coco" in asked:
            whole = asked.pop("coco")
            for name in parts:
                asked[f"coco:{name}"] = split_file_name(whole, name)
    if mode not in ("link", "copy"):
        raise ExportError(f"mode must be 'link' or 'copy', not {mode!r}")
    protected = [(Path(p), what) for p, what in ((photo_folder, "the photo folder"),
                                                 (store, "the project store")) if p is not None]
    _check_destinations(asked, protected, overwrite)

    documents = {}
    if "coco" in asked:
        documents["coco"] = coco_document(photos, description=description, date_created=date_created)
    elif split_of is not None:
        every_label = {p.label for p in photos}
        for name, members in parts.items():
            if f"coco:{name}" in asked:
                documents[f"coco:{name}"] = coco_document(
                    members, description=f"{description} ({name})", date_created=date_created,
                    labels=every_label)
    plan, kept = None, {}
    if "folders" in asked:
        if photo_folder is None or not Path(photo_folder).is_dir():
            raise ExportError(f"Cannot export: the photo folder {photo_folder} does not exist.")
        source_root = Path(photo_folder)
        missing = [p.path for p in photos if not (source_root / p.path).is_file()]
        if missing:
            more = f" (and {len(missing) - 5} more)" if len(missing) > 5 else ""
            raise ExportError(f"Cannot export: {len(missing)} photo(s) missing from {source_root}: "
                              + ", ".join(missing[:5]) + more)
        plan = _folder_plan(photos, split, seed)
        try:
            kept = _folder_keeps(asked["folders"], plan, overwrite)
        except OSError as e:
            raise ExportError(f"Cannot export to {asked['folders']}: {_reason(e)}") from e

    for parent in {d.parent for d in asked.values()}:
        clean_stale_temporaries(parent)
    written: dict = {}
    targets: list[_Target] = []
    current = None
    try:
        for kind, dest in asked.items():
            current = dest
            if kind == "folders":
                targets.append(_Target(dest, _new_temp_dir(dest), True))
                _write_folders(targets[-1].tmp, plan, source_root, mode, split, seed)
                _place_kept(dest, targets[-1].tmp, kept)
                written[kind] = plan[3]
            else:
                targets.append(_Target(dest, _new_temp_file(dest), False))
                if kind == "csv":
                    written[kind] = _write_csv(targets[-1].tmp, photos, split_of)
                elif kind == "coco":
                    written[kind] = _write_coco(targets[-1].tmp, documents[kind])
                else:  # one COCO file of a split: {"coco": {split: {"path", "images", ...}}}
                    counts = _write_coco(targets[-1].tmp, documents[kind])
                    written.setdefault("coco", {})[kind.split(":", 1)[1]] = {"path": str(dest), **counts}
        current = None
        _commit(targets)
    except OSError as e:
        for t in targets:
            _roll_back(t)
        where = f" to {current}" if current else ""
        raise ExportError(f"Cannot export{where}: {_reason(e)}; nothing was changed.") from e
    except BaseException:
        for t in targets:
            _roll_back(t)
        raise
    return written


def split_file_name(path, split: str) -> Path:
    """Where the COCO file of one split goes: the split name joins the file name before its first
    suffix (``labels.json`` -> ``labels-train.json``, ``out/labels.coco.json`` ->
    ``out/labels-train.coco.json``)."""
    path = Path(path)
    stem, dot, rest = path.name.partition(".")
    if not stem:                                     # a name starting with a dot
        return path.with_name(f"{path.name}-{split}")
    return path.with_name(f"{stem}-{split}{dot}{rest}")


def folder_export_mode(directory) -> str | None:
    """How a class-folder export holds its photos, from its marker: "link" or "copy" (copy also
    when links failed on that disk); None when ``directory`` is not a Kinfold export."""
    try:
        mode = json.loads((Path(directory) / MARKER_NAME).read_text("utf-8")).get("mode")
    except (OSError, ValueError, AttributeError):
        return None
    return mode if mode in ("link", "copy") else None


def export_csv(path, photos: Sequence[LabelledPhoto], *, overwrite: bool = False,
               photo_folder=None, store=None) -> int:
    """Write one row per photo, ``path,label,how,annotator,time``; return the rows written.

    The file follows RFC 4180: UTF-8, CRLF line ends, a header row, and cells holding commas,
    double quotes or line breaks quoted (quotes doubled). Rows are sorted by path.

    Formula neutralisation, in the free-text columns only (``label``, ``annotator``): a cell
    that starts with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return would be run as a
    formula by a spreadsheet, so it is written with a single quote ``'`` in front (``=SUM(A1)``
    becomes ``'=SUM(A1)``); programs reading the CSV see that quote as part of the value. The
    ``path`` column is written unchanged, so every path names its file.
    """
    return export_all(photos, csv=path, overwrite=overwrite, photo_folder=photo_folder,
                      store=store)["csv"]


def export_coco(path, photos: Sequence[LabelledPhoto], *, description: str = "Kinfold export",
                date_created=None, overwrite: bool = False, photo_folder=None, store=None) -> dict:
    """Write a COCO JSON file (images sorted by path, categories by name, ids from 1).

    Each photo gets one image-level annotation (``id``, ``image_id``, ``category_id``) and no
    ``bbox``: the label belongs to the whole photo. ``date_created`` is a datetime or ISO 8601
    string (default: now, UTC). ``info.kinfold_export`` marks the file as Kinfold's. Returns
    ``{"images": n, "annotations": n, "categories": k}``.
    """
    return export_all(photos, coco=path, description=description, date_created=date_created,
                      overwrite=overwrite, photo_folder=photo_folder, store=store)["coco"]


def export_folders(directory, photos: Sequence[LabelledPhoto], source_root, *, split=None,
                   seed: int = 0, mode: str = "link", overwrite: bool = False,
                   store=None) -> dict:
    """Write ``directory/<label>/<file>``, or ``directory/<split>/<label>/<file>`` with a split.

    ``mode="link"`` makes symbolic links to the photos' absolute paths (copying instead
    wherever links fail); ``mode="copy"`` copies them. ``split`` is None, 1 to 3 fractions for
    train/val/test, or a ``{name: fraction}`` mapping; see :func:`stratified_split`. Label
    folders are named by :func:`folder_names`; photos whose file names clash in one folder get
    a short hash of their relative path in front. The marker file ``.kinfold-export.json``
    (label → folder, counts, the files written) marks the folder as an export: a later export
    replaces those files and keeps everything else found there.

    A split leaves a class folder out where it has no photos of that label (``ImageFolder``
    refuses empty class folders), so compare classes by name, not index, across splits.

    Returns photo counts per label, ``{label: n}``, or ``{split: {label: n}}`` with a split.
    """
    return export_all(photos, folders=directory, photo_folder=source_root, split=split,
                      seed=seed, mode=mode, overwrite=overwrite, store=store)["folders"]
