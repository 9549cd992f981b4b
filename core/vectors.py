"""Embeddings in a memory-mapped float32 file beside the SQLite store, one row per photo.

Layout: for each extractor, one file `vectors-<token>.f32` in the store folder holding rows of
`dim` float32 values, no header. The store's table `vector_files` names the file (token), its
dimension and how many rows are committed; `vector_rows` maps (fingerprint, extractor) to a row.

Crash safety, in the order of the writes:
- `put` writes the new rows after the committed ones, flushes them to disk, then commits their
  `vector_rows` entries and the new row count in one transaction. A crash in between leaves rows
  past the committed count that nothing refers to; the next `put` writes over them.
- `compact` writes a new file under a new token (rows in the order asked for, nothing else), flushes
  it, switches the tables to it in one transaction, then deletes the old file. A crash leaves at most
  a file no table names, which `remove_stale_files` deletes at the next opening.

Reading maps the file (`numpy.memmap`, read-only): `matrix` returns the map itself when the rows
asked for are the file's rows in order (what `compact` leaves behind after a scan), so the
features cost no memory beyond the operating system's page cache; otherwise one gathered copy.
Nothing is read until `matrix` is called.

Projects written before schema 3 kept each vector as a BLOB in the `embeddings` table; `upgrade`
moves them into files (same two-step order) and empties the table.
"""
from __future__ import annotations

import os
import secrets
from pathlib import Path
from typing import Sequence

import numpy as np

DTYPE = np.float32
_COPY_ROWS = 16384


class VectorError(Exception):
    """A vectors file that is missing or does not fit its table entry; the message says which."""


def file_name(token: str) -> str:
    return f"vectors-{token}.f32"


class Vectors:
    """The embeddings of one store. `store` provides `directory`, `transaction()` (yielding the
    sqlite connection), `_lock` and `_conn()` (see core/store.py)."""

    def __init__(self, store):
        self.store = store
        self.directory = Path(store.directory)
        self._maps: dict[str, tuple[str, int, np.ndarray | None]] = {}

    # -- reading ---------------------------------------------------------------------------
    def _q(self, sql: str, params=()) -> list:
        with self.store._lock:
            return self.store._conn().execute(sql, params).fetchall()

    def file_entry(self, extractor: str) -> tuple[str, int, int] | None:
        """(token, dim, rows) of the extractor's file, or None."""
        r = self._q("SELECT token, dim, rows FROM vector_files WHERE extractor=?", (extractor,))
        return tuple(r[0]) if r else None

    def extractors(self) -> list[str]:
        return [r[0] for r in self._q("SELECT extractor FROM vector_files ORDER BY extractor")]

    def fingerprints(self, extractor: str) -> set[str]:
        return {r[0] for r in self._q("SELECT fingerprint FROM vector_rows WHERE extractor=?", (extractor,))}

    def count(self, extractor: str) -> int:
        return self._q("SELECT count(*) FROM vector_rows WHERE extractor=?", (extractor,))[0][0]

    def _map(self, extractor: str) -> tuple[np.ndarray, int]:
        entry = self.file_entry(extractor)
        if entry is None:
            raise VectorError(f"no embeddings for {extractor}")
        token, dim, rows = entry
        cached = self._maps.get(extractor)
        if cached is not None and cached[0] == token and cached[1] == rows:
            return cached[2], dim
        path = self.directory / file_name(token)
        need = rows * dim * np.dtype(DTYPE).itemsize
        try:
            size = path.stat().st_size
        except OSError as exc:
            raise VectorError(f"the embeddings file {path.name} is missing from {self.directory} "
                              f"({exc.strerror}); scan again to embed the photos anew") from None
        if size < need:
            raise VectorError(f"the embeddings file {path.name} is shorter than the store says "
                              f"({size} of {need} bytes); scan again to embed the photos anew")
        mm = np.memmap(path, dtype=DTYPE, mode="r", shape=(rows, dim)) if rows else np.zeros((0, dim), DTYPE)
        _read_ahead(mm)
        self._maps[extractor] = (token, rows, mm)
        return mm, dim

    def rows_of(self, extractor: str, fingerprints: Sequence[str]) -> np.ndarray:
        table = dict(self._q("SELECT fingerprint, row FROM vector_rows WHERE extractor=?", (extractor,)))
        missing = [fp for fp in fingerprints if fp not in table]
        if missing:
            raise VectorError(f"{len(missing)} photos have no embedding for {extractor}")
        return np.fromiter((table[fp] for fp in fingerprints), np.int64, len(fingerprints))

    def matrix(self, extractor: str, fingerprints: Sequence[str]) -> np.ndarray:
        """(len(fingerprints), dim) float32 rows in the order given: the memory map itself when those
        are the file's rows in order, else one gathered copy."""
        if not fingerprints:
            return np.zeros((0, 0), DTYPE)
        rows = self.rows_of(extractor, fingerprints)
        mm, _ = self._map(extractor)
        if len(rows) <= len(mm) and np.array_equal(rows, np.arange(len(rows))):
            return mm[:len(rows)]
        out = np.empty((len(rows), mm.shape[1]), DTYPE)
        for s in range(0, len(rows), _COPY_ROWS):
            out[s:s + _COPY_ROWS] = mm[rows[s:s + _COPY_ROWS]]
        return out

    # -- writing ---------------------------------------------------------------------------
    def _release(self, extractor: str | None = None) -> None:
        for key in list(self._maps) if extractor is None else [extractor]:
            self._maps.pop(key, None)

    def put(self, extractor: str, fingerprints: Sequence[str], vectors: np.ndarray) -> None:
        """Add (or replace) the rows of `fingerprints`; committed when this returns."""
        vectors = np.ascontiguousarray(vectors, DTYPE)
        if len(fingerprints) != len(vectors):
            raise ValueError("one vector per fingerprint")
        if not len(fingerprints):
            return
        dim = int(vectors.shape[1])
        with self.store.transaction() as db:
            r = db.execute("SELECT token, dim, rows FROM vector_files WHERE extractor=?", (extractor,)).fetchone()
            if r is None:
                token, rows = secrets.token_hex(8), 0
                db.execute("INSERT INTO vector_files(extractor, token, dim, rows) VALUES (?, ?, ?, 0)",
                           (extractor, token, dim))
            else:
                token, old_dim, rows = r
                if old_dim != dim:
                    raise VectorError(f"{extractor} gave {dim}-d vectors, its file holds {old_dim}-d")
            _write_rows(self.directory / file_name(token), rows * dim * vectors.itemsize, vectors)
            db.executemany("INSERT OR REPLACE INTO vector_rows(fingerprint, extractor, row) VALUES (?, ?, ?)",
                           [(fp, extractor, rows + i) for i, fp in enumerate(fingerprints)])
            db.execute("UPDATE vector_files SET rows=? WHERE extractor=?", (rows + len(vectors), extractor))
        self._release(extractor)

    def compact(self, extractor: str | None, fingerprints: Sequence[str]) -> bool:
        """Keep only `extractor`'s rows of `fingerprints`, in that order (first occurrence of a
        repeated fingerprint), in a new file; drop every other extractor's file. Returns whether
        anything changed."""
        changed = False
        others = [e for e in self.extractors() if e != extractor]
        old_files = []
        if others:
            with self.store.transaction() as db:
                for e in others:
                    old_files += [r[0] for r in db.execute("SELECT token FROM vector_files WHERE extractor=?", (e,))]
                    db.execute("DELETE FROM vector_rows WHERE extractor=?", (e,))
                    db.execute("DELETE FROM vector_files WHERE extractor=?", (e,))
            changed = True
        if extractor is not None and self.file_entry(extractor) is not None:
            keep = list(dict.fromkeys(fingerprints))
            table = dict(self._q("SELECT fingerprint, row FROM vector_rows WHERE extractor=?", (extractor,)))
            keep = [fp for fp in keep if fp in table]
            rows = np.fromiter((table[fp] for fp in keep), np.int64, len(keep))
            token, dim, n_rows = self.file_entry(extractor)
            if not (n_rows == len(keep) == len(table) and np.array_equal(rows, np.arange(len(keep)))):
                mm, _ = self._map(extractor)
                new = secrets.token_hex(8)
                path = self.directory / file_name(new)
                with open(path, "wb") as fh:
                    for s in range(0, len(rows), _COPY_ROWS):
                        fh.write(np.ascontiguousarray(mm[rows[s:s + _COPY_ROWS]]).tobytes())
                    fh.flush()
                    os.fsync(fh.fileno())
                with self.store.transaction() as db:
                    db.execute("DELETE FROM vector_rows WHERE extractor=?", (extractor,))
                    db.executemany("INSERT INTO vector_rows(fingerprint, extractor, row) VALUES (?, ?, ?)",
                                   [(fp, extractor, i) for i, fp in enumerate(keep)])
                    db.execute("UPDATE vector_files SET token=?, rows=? WHERE extractor=?", (new, len(keep), extractor))
                old_files.append(token)
                changed = True
        self._release()
        for token in old_files:
            (self.directory / file_name(token)).unlink(missing_ok=True)
        return changed

    def remove_stale_files(self) -> int:
        """Delete vectors files no table names (left by a crash during `compact` or `put` of a new
        extractor). Returns how many."""
        named = {file_name(r[0]) for r in self._q("SELECT token FROM vector_files")}
        gone = 0
        for path in self.directory.glob("vectors-*.f32"):
            if path.name not in named:
                try:
                    path.unlink()
                    gone += 1
                except OSError:
                    pass
        return gone

    def upgrade(self) -> int:
        """Move vectors kept as BLOBs in the `embeddings` table (stores before schema 3) into files.
        Returns how many rows moved."""
        moved = 0
        extractors = [r[0] for r in self._q("SELECT DISTINCT extractor FROM embeddings")]
        for ext in extractors:
            rows = self._q("SELECT fingerprint, vector FROM embeddings WHERE extractor=?", (ext,))
            fps = [r[0] for r in rows]
            have = self.fingerprints(ext)
            todo = [(fp, v) for fp, v in rows if fp not in have]
            if todo:
                vecs = np.stack([np.frombuffer(v, DTYPE) for _, v in todo])
                self.put(ext, [fp for fp, _ in todo], vecs)
            with self.store.transaction() as db:
                db.executemany("DELETE FROM embeddings WHERE fingerprint=? AND extractor=?", [(fp, ext) for fp in fps])
            moved += len(todo)
        return moved


def _read_ahead(mm) -> None:
    """Ask the kernel to read the mapped file in the background. Once mapped, rows are wanted soon and
    at random (a group's members for its pair similarity): from a cold file each costs a disk read,
    about 70 ms for a 96-photo group of 1,280-d rows measured at 100,000 photos. Only a hint: the
    kernel reads what memory allows and nothing waits for it."""
    import mmap

    handle = getattr(mm, "_mmap", None)
    if handle is not None and hasattr(handle, "madvise") and hasattr(mmap, "MADV_WILLNEED"):
        try:
            handle.madvise(mmap.MADV_WILLNEED)
        except OSError:
            pass


def _write_rows(path: Path, offset: int, vectors: np.ndarray) -> None:
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        data = memoryview(vectors.tobytes())
        done = 0
        while done < len(data):
            done += os.pwrite(fd, data[done:], offset + done)
        os.fsync(fd)
    finally:
        os.close(fd)
