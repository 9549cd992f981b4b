"""Finding the photos in a folder: a recursive walk, content fingerprints, and a report of every file
that was skipped and why.

A file whose size and modification time match the previous scan keeps its fingerprint without
being read again; any other file is hashed, so an edited photo gets a new fingerprint (and a new
embedding) while a renamed or moved one keeps its old fingerprint (and its label).
"""
from __future__ import annotations

import hashlib
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

from core.images import IMAGE_SUFFIXES, PhotoError, probe
from core.store import PhotoRow

Progress = Callable[[int, int, str], None]
Cancel = Callable[[], bool]

_HASH_CHUNK = 1 << 20


@dataclass
class CatalogueResult:
    photos: list[PhotoRow]
    skipped: dict[str, tuple[int, int, str]]      # path -> (size, mtime_ns, reason)
    new: list[str] = field(default_factory=list)
    changed: list[str] = field(default_factory=list)
    removed: list[str] = field(default_factory=list)
    cancelled: bool = False


def fingerprint(path: Path) -> str:
    """BLAKE2b-128 of the file's bytes: identical content, identical fingerprint, wherever it lives."""
    h = hashlib.blake2b(digest_size=16)
    with open(path, "rb") as f:
        while chunk := f.read(_HASH_CHUNK):
            h.update(chunk)
    return h.hexdigest()


def walk(root: Path, ignore: Path | None = None) -> list[Path]:
    """Every regular file under root, sorted, leaving out hidden files and folders (the project
    store lives in `.kinfold/`) and `ignore` (a store placed inside the folder under another name)."""
    out = []
    for dirpath, dirnames, filenames in os.walk(root, followlinks=False):
        here = Path(dirpath)
        dirnames[:] = sorted(d for d in dirnames if not d.startswith(".") and (ignore is None or here / d != ignore))
        for name in filenames:
            if not name.startswith("."):
                out.append(here / name)
    out.sort()
    return out


def scan_folder(root: Path, previous: dict[str, PhotoRow], previous_skipped: dict[str, tuple[int, int, str]],
                *, ignore: Path | None = None, progress: Progress | None = None,
                cancel: Cancel | None = None, threads: int = 4) -> CatalogueResult:
    root = Path(root)
    if not root.is_dir():
        raise NotADirectoryError(f"{root} is not a folder")
    files = walk(root, ignore)
    photos: list[PhotoRow] = []
    skipped: dict[str, tuple[int, int, str]] = {}
    result = CatalogueResult(photos, skipped)
    to_read: list[tuple[str, Path, int, int]] = []
    for f in files:
        rel = f.relative_to(root).as_posix()
        try:
            st = f.stat()
        except OSError as exc:
            skipped[rel] = (0, 0, f"cannot read: {exc.strerror}")
            continue
        if f.suffix.lower() not in IMAGE_SUFFIXES:
            skipped[rel] = (st.st_size, st.st_mtime_ns, f"not a photo (file type '{f.suffix or 'none'}')")
            continue
        old = previous.get(rel)
        if old is not None and old.size == st.st_size and old.mtime_ns == st.st_mtime_ns:
            photos.append(old)
            continue
        old_skip = previous_skipped.get(rel)
        if old_skip is not None and old_skip[:2] == (st.st_size, st.st_mtime_ns):
            skipped[rel] = old_skip
            continue
        to_read.append((rel, f, st.st_size, st.st_mtime_ns))

    def read(item):
        rel, f, size, mtime = item
        try:
            width, height = probe(f)
            return PhotoRow(rel, fingerprint(f), size, mtime, width, height), None
        except PhotoError as exc:
            return None, str(exc)
        except OSError as exc:
            return None, f"cannot read: {exc.strerror or exc}"

    total = len(to_read)
    with ThreadPoolExecutor(max_workers=threads) as pool:
        for done, (item, (row, reason)) in enumerate(zip(to_read, pool.map(read, to_read)), 1):
            rel, _, size, mtime = item
            if row is None:
                skipped[rel] = (size, mtime, reason)
            else:
                photos.append(row)
                (result.changed if rel in previous else result.new).append(rel)
            if progress:
                progress(done, total, "reading files")
            if cancel and cancel():
                result.cancelled = True
                # Keep what was there before for the files not yet read, so nothing is lost.
                seen = {p.path for p in photos} | set(skipped)
                photos.extend(r for p, r in previous.items() if p not in seen)
                break
    present = {p.path for p in photos} | set(skipped)
    result.removed = sorted(p for p in previous if p not in present)
    photos.sort(key=lambda p: p.path)
    return result
