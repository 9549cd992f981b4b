"""Finding the photos in a folder: a recursive walk, content fingerprints, and a report of every file
that was skipped and why.

A file whose size and modification time match the previous scan keeps its fingerprint without
being read again; any other file is hashed, so an edited photo gets a new fingerprint (and a new
embedding) while a renamed or moved one keeps its old fingerprint (and its label).

What is read (the rule README states):
- regular files only; named pipes, sockets and devices are skipped with a reason, and every file
  is opened so that the open cannot block (`core.images.open_regular`);
- a symbolic link to a file is followed when the file it points to lies inside the folder, and
  skipped with a reason when it lies outside (nothing from outside the folder is read or
  exported); symbolic links to folders are never followed (loops, photos counted twice) and are
  listed as skipped; hidden files and folders (names starting with ".") are left out silently;
- a file or folder whose name is not valid UTF-8 is skipped with a reason, the name shown with
  backslash escapes (b"bad\\xff.jpg" -> "bad\\\\xff.jpg"): paths are stored, exported and shown as
  text, and such a name cannot be written to a CSV or COCO file as it is.

Skips are of two kinds. A file that is not a readable photo as it stands (wrong type, damaged,
not a regular file) is remembered with its size and modification time and not read again until
either changes. A failure that may pass (an I/O error, no permission, not enough memory) is only
reported: the next scan tries the file again, and a photo already catalogued keeps its entry.
"""
from __future__ import annotations

import hashlib
import os
import stat
import threading
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import BinaryIO, Callable

from core.images import IMAGE_SUFFIXES, PhotoError, file_kind, not_regular, open_regular, probe
from core.store import PhotoRow

Progress = Callable[[int, int, str], None]
Cancel = Callable[[], bool]

_HASH_CHUNK = 1 << 20
_POLL_SECONDS = 0.1          # how often cancel is asked while a worker is busy with one large file


@dataclass
class CatalogueResult:
    photos: list[PhotoRow]
    skipped: dict[str, tuple[int, int, str]]      # path -> (size, mtime_ns, reason): remembered
    retry: dict[str, str] = field(default_factory=dict)   # path -> reason: this scan only, tried again next time
    new: list[str] = field(default_factory=list)
    changed: list[str] = field(default_factory=list)
    removed: list[str] = field(default_factory=list)
    cancelled: bool = False


def result_or_cancel(future, cancel: Cancel | None):
    """The future's result, asking `cancel` every fraction of a second while it is not ready, so a
    slow file never delays a cancel; None once cancel said yes."""
    while True:
        try:
            return future.result(timeout=_POLL_SECONDS)
        except TimeoutError:
            if cancel is not None and cancel():
                return None


class _Stopped(Exception):
    """Raised inside a worker when the scan was cancelled."""


def fingerprint(f: BinaryIO, stop: threading.Event | None = None) -> str:
    """BLAKE2b-128 of the bytes of the open file `f` from where it stands: identical content,
    identical fingerprint, wherever it lives. `stop` ends a long read early."""
    h = hashlib.blake2b(digest_size=16)
    while chunk := f.read(_HASH_CHUNK):
        if stop is not None and stop.is_set():
            raise _Stopped
        h.update(chunk)
    return h.hexdigest()


def shown_name(name: str) -> str:
    """A name from the file system as text that encodes: bytes that are not UTF-8 (decoded by
    Python as lone surrogates) become backslash escapes."""
    return os.fsencode(name).decode("utf-8", "backslashreplace")


def _is_text(name: str) -> bool:
    try:
        name.encode("utf-8")
        return True
    except UnicodeEncodeError:
        return False


def is_inside(real_root: str, path: str) -> bool:
    """Whether `path`, its symbolic links followed, lies inside the folder whose real path is `real_root`
    (for export: a link retargeted outside after the scan must not be copied)."""
    real = os.path.realpath(path)
    return real != real_root and os.path.commonpath([real_root, real]) == real_root


@dataclass
class _Walk:
    files: list[tuple[str, str, os.stat_result]]          # (relative path, path, stat) to consider
    skipped: dict[str, tuple[int, int, str]]               # remembered-kind skips found by the walk
    retry: dict[str, str]                                  # folders or files that could not be looked at
    unreadable_dirs: list[str]                             # relative paths of folders that failed to list
    cancelled: bool = False


def walk(root: Path, cancel: Cancel | None = None) -> _Walk:
    """Every file under root, sorted, with the walk's own skips (see the module's rule). Hidden files
    and folders, the project store `.kinfold/` among them, are left out. `cancel` is asked at
    every folder."""
    root_s = os.fspath(root)
    real_root = os.path.realpath(root_s)
    out = _Walk([], {}, {}, [])
    stack = [(root_s, "")]
    while stack:
        if cancel is not None and cancel():
            out.cancelled = True
            break
        here, prefix = stack.pop()
        try:
            with os.scandir(here) as it:
                entries = sorted(it, key=lambda e: e.name)
        except OSError as exc:
            if prefix:
                out.retry[prefix.rstrip("/")] = f"cannot open the folder: {exc.strerror or exc}"
                out.unreadable_dirs.append(prefix.rstrip("/"))
                continue
            raise
        for e in entries:
            name = e.name
            if name.startswith("."):
                continue
            rel = prefix + name
            if not _is_text(name):
                what = "folder" if e.is_dir(follow_symlinks=False) else "file"
                out.skipped[shown_name(rel)] = (0, 0, f"the {what} name is not valid UTF-8 (shown with \\x "
                                                      f"escapes); rename it to include it")
                continue
            try:
                if e.is_dir(follow_symlinks=False):
                    stack.append((e.path, rel + "/"))
                elif e.is_file(follow_symlinks=False):
                    out.files.append((rel, e.path, e.stat(follow_symlinks=False)))
                elif e.is_symlink():
                    _link(e, rel, real_root, out)
                else:
                    st = e.stat(follow_symlinks=False)
                    out.skipped[rel] = (st.st_size, st.st_mtime_ns, not_regular(st.st_mode))
            except OSError as exc:
                out.retry[rel] = f"cannot read: {exc.strerror or exc}"
    out.files.sort(key=lambda f: f[0])
    return out


def _link(e: os.DirEntry, rel: str, real_root: str, out: _Walk) -> None:
    try:
        st = os.stat(e.path)
    except OSError as exc:
        reason = ("a symbolic link whose target does not exist" if isinstance(exc, FileNotFoundError)
                  else f"a symbolic link that cannot be followed: {exc.strerror or exc}")
        out.skipped[rel] = (0, 0, reason)
        return
    if stat.S_ISDIR(st.st_mode):
        out.skipped[rel] = (0, 0, "a symbolic link to a folder: not followed (copy or move the photos "
                                  "into the folder instead)")
    elif not is_inside(real_root, e.path):
        out.skipped[rel] = (0, 0, "a symbolic link to a file outside the folder: not read (only files "
                                  "inside the folder are catalogued and exported)")
    elif not stat.S_ISREG(st.st_mode):
        out.skipped[rel] = (0, 0, f"a symbolic link to {file_kind(st.st_mode)}: only regular files are read")
    else:
        out.files.append((rel, e.path, st))


def scan_folder(root: Path, previous: dict[str, PhotoRow], previous_skipped: dict[str, tuple[int, int, str]],
                *, progress: Progress | None = None, cancel: Cancel | None = None,
                threads: int = 4) -> CatalogueResult:
    """Catalogue `root` against the previous scan. Cancel is honoured within a fraction of a second,
    also in the middle of hashing a large file; the previous entries of the files not read are kept."""
    root = Path(root)
    if not root.is_dir():
        raise NotADirectoryError(f"{root} is not a folder")
    found = walk(root, cancel)
    if found.cancelled:  # the folder was not seen whole: everything stays as it was
        return CatalogueResult(sorted(previous.values(), key=lambda p: p.path), dict(previous_skipped),
                               cancelled=True)
    photos: list[PhotoRow] = []
    skipped = dict(found.skipped)
    result = CatalogueResult(photos, skipped, dict(found.retry))
    to_read: list[tuple[str, str, os.stat_result]] = []
    for rel, path, st in found.files:
        if os.path.splitext(rel)[1].lower() not in IMAGE_SUFFIXES:
            suffix = os.path.splitext(rel)[1] or "none"
            skipped[rel] = (st.st_size, st.st_mtime_ns, f"not a photo (file type '{suffix}')")
            continue
        old = previous.get(rel)
        if old is not None and old.size == st.st_size and old.mtime_ns == st.st_mtime_ns:
            photos.append(old)
            continue
        old_skip = previous_skipped.get(rel)
        if old_skip is not None and old_skip[:2] == (st.st_size, st.st_mtime_ns):
            skipped[rel] = old_skip
            continue
        to_read.append((rel, path, st))

    stop = threading.Event()

    def read(item):
        rel, path, walked = item
        try:
            with open_regular(path) as fh:
                st = os.fstat(fh.fileno())
                width, height = probe(fh)
                fh.seek(0)
                row = PhotoRow(rel, fingerprint(fh, stop), st.st_size, st.st_mtime_ns, width, height)
            return row, None, False
        except _Stopped:
            return None
        except PhotoError as exc:
            return None, str(exc), exc.retry
        except OSError as exc:   # reading the bytes for the fingerprint
            return None, f"cannot read the file: {exc.strerror or exc}", True
        except MemoryError:
            return None, "not enough memory to read it", True
        except Exception as exc:  # one odd file must never stop the scan; it is tried again next time
            return None, f"could not be read ({type(exc).__name__}: {exc})", True

    total = len(to_read)
    pool = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="kinfold-catalogue")
    pending: deque = deque()
    submitted = done = 0
    try:
        while submitted < total or pending:
            while submitted < total and len(pending) < 4 * threads:
                pending.append((to_read[submitted], pool.submit(read, to_read[submitted])))
                submitted += 1
            (rel, _, walked), future = pending.popleft()
            outcome = result_or_cancel(future, cancel)
            if outcome is None:
                result.cancelled = True
                break
            row, reason, again = outcome
            if row is not None:
                photos.append(row)
                (result.changed if rel in previous else result.new).append(rel)
            elif again:
                result.retry[rel] = reason
            else:
                # Keyed by what the walk saw, which the next scan compares against.
                skipped[rel] = (walked.st_size, walked.st_mtime_ns, reason)
            done += 1
            if progress:
                progress(done, total, "reading files")
            if cancel and cancel():
                result.cancelled = True
                break
    finally:
        stop.set()
        pool.shutdown(wait=True, cancel_futures=True)

    # What could not be looked at this time keeps its previous entry: nothing is dropped for a
    # failure that may pass, or for a file the cancelled scan did not reach.
    seen = {p.path for p in photos} | set(skipped)
    keep = set(result.retry)
    if result.cancelled:
        keep |= {item[0] for item in to_read[done:]}
    dirs = tuple(d + "/" for d in found.unreadable_dirs)
    for p, r in previous.items():
        if p not in seen and (p in keep or p.startswith(dirs)):
            photos.append(r)
    for p, v in previous_skipped.items():
        if p not in seen and p not in result.retry and (p in keep or p.startswith(dirs)):
            skipped[p] = v
    present = {p.path for p in photos} | set(skipped)
    result.removed = sorted(p for p in previous if p not in present)
    photos.sort(key=lambda p: p.path)
    return result
