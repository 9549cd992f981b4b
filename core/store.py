"""The project store: one SQLite file (WAL mode) holding photos, embeddings, labels, the decision
log and the current proposals.

Labels are keyed by content fingerprint, so a renamed or moved photo keeps its label. Every write
method commits its own transaction before it returns, so a decision survives a crash.
"""
from __future__ import annotations

import json
import sqlite3
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Sequence

import numpy as np

SCHEMA_VERSION = 2
STORE_FILE = "kinfold.sqlite"

# Each entry upgrades the schema from version i to i + 1. Never edit an entry once released.
_MIGRATIONS: list[str] = [
    # 0 -> 1: the first schema.
    """
    CREATE TABLE photos (
        path TEXT PRIMARY KEY,            -- relative POSIX path inside the folder
        fingerprint TEXT NOT NULL,
        size INTEGER NOT NULL,
        mtime_ns INTEGER NOT NULL,
        width INTEGER NOT NULL,
        height INTEGER NOT NULL
    );
    CREATE INDEX photos_fp ON photos(fingerprint);
    CREATE TABLE skipped (
        path TEXT PRIMARY KEY,
        size INTEGER NOT NULL,
        mtime_ns INTEGER NOT NULL,
        reason TEXT NOT NULL
    );
    CREATE TABLE embeddings (
        fingerprint TEXT NOT NULL,
        extractor TEXT NOT NULL,
        vector BLOB NOT NULL,             -- float32, L2-normalised
        PRIMARY KEY (fingerprint, extractor)
    );
    CREATE TABLE labels (
        fingerprint TEXT PRIMARY KEY,
        state TEXT NOT NULL CHECK (state IN ('labelled', 'set_aside')),
        label TEXT,                       -- NULL when set aside
        how TEXT NOT NULL,
        annotator TEXT NOT NULL,
        time TEXT NOT NULL
    );
    CREATE TABLE decisions (              -- append-only
        id INTEGER PRIMARY KEY AUTOINCREMENT,
        kind TEXT NOT NULL,
        label TEXT,
        annotator TEXT NOT NULL,
        time TEXT NOT NULL,
        group_id INTEGER,
        photos TEXT NOT NULL,             -- JSON list of relative paths
        before TEXT NOT NULL,             -- JSON {fingerprint: previous label row or null}, for undo
        undoes INTEGER                    -- for kind 'undo': the decision it reverses
    );
    CREATE TABLE proposals (
        id INTEGER PRIMARY KEY AUTOINCREMENT,
        members TEXT NOT NULL,            -- JSON list of relative paths, anchor first
        trust REAL NOT NULL,
        suggested_label TEXT,
        confidence REAL,
        kind TEXT NOT NULL,
        open INTEGER NOT NULL DEFAULT 1,
        pinned INTEGER NOT NULL DEFAULT 0 -- parts of a split, shown before anything else
    );
    CREATE TABLE settings (key TEXT PRIMARY KEY, value TEXT NOT NULL);
    """,
    # 1 -> 2: photos left for later, and relearned embedding versions.
    """
    CREATE TABLE deferred (fingerprint TEXT PRIMARY KEY, time REAL NOT NULL);
    CREATE TABLE rejections (             -- 'not this label': photos taken out of an accepted group
        fingerprint TEXT NOT NULL,
        label TEXT NOT NULL,
        decision INTEGER NOT NULL,
        PRIMARY KEY (fingerprint, label, decision)
    );
    CREATE TABLE relearn_versions (
        id INTEGER PRIMARY KEY AUTOINCREMENT,
        time TEXT NOT NULL,
        extractor TEXT NOT NULL,
        settings TEXT NOT NULL,           -- JSON
        figures TEXT NOT NULL,            -- JSON of what the relearn measured
        state BLOB NOT NULL,              -- the learned head, serialised
        active INTEGER NOT NULL DEFAULT 0
    );
    """,
]
assert len(_MIGRATIONS) == SCHEMA_VERSION


class StoreError(Exception):
    pass


@dataclass(frozen=True)
class PhotoRow:
    path: str
    fingerprint: str
    size: int
    mtime_ns: int
    width: int
    height: int


@dataclass(frozen=True)
class LabelRow:
    fingerprint: str
    state: str
    label: str | None
    how: str
    annotator: str
    time: str


@dataclass(frozen=True)
class ProposalRow:
    id: int
    members: list[str]
    trust: float
    suggested_label: str | None
    confidence: float | None
    kind: str
    pinned: bool


def utc_now() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())


class Store:
    """Thin typed access to the SQLite file. Safe to share between threads (one lock)."""

    def __init__(self, directory: Path):
        self.directory = Path(directory)
        try:
            self.directory.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise StoreError(f"cannot create the project store at {self.directory}: {exc.strerror}. "
                             "Choose a writable store location (store=...).") from exc
        self.path = self.directory / STORE_FILE
        self._lock = threading.RLock()
        try:
            self._db = sqlite3.connect(self.path, check_same_thread=False, isolation_level=None)
            self._db.execute("PRAGMA journal_mode=WAL")
            self._db.execute("PRAGMA synchronous=NORMAL")  # WAL + NORMAL: durable against app crashes
            self._db.execute("PRAGMA foreign_keys=ON")
        except sqlite3.Error as exc:
            raise StoreError(f"cannot open the project store {self.path}: {exc}") from exc
        self._migrate()

    # -- schema ------------------------------------------------------------------------------
    def _migrate(self) -> None:
        with self._lock:
            version = self._db.execute("PRAGMA user_version").fetchone()[0]
            if version > SCHEMA_VERSION:
                raise StoreError(f"{self.path} was written by a newer Kinfold (schema {version}, "
                                 f"this one knows {SCHEMA_VERSION}); upgrade Kinfold to open it.")
            for v in range(version, SCHEMA_VERSION):
                with self.transaction() as db:
                    for stmt in _split_sql(_MIGRATIONS[v]):
                        db.execute(stmt)
                    db.execute(f"PRAGMA user_version={v + 1}")

    def close(self) -> None:
        with self._lock:
            self._db.close()

    def transaction(self):
        return _Transaction(self._db, self._lock)

    def schema_version(self) -> int:
        return self._db.execute("PRAGMA user_version").fetchone()[0]

    # -- settings ----------------------------------------------------------------------------
    def get_setting(self, key: str, default=None):
        row = self._db.execute("SELECT value FROM settings WHERE key=?", (key,)).fetchone()
        return json.loads(row[0]) if row else default

    def set_setting(self, key: str, value) -> None:
        with self.transaction() as db:
            db.execute("INSERT OR REPLACE INTO settings(key, value) VALUES (?, ?)", (key, json.dumps(value)))

    # -- photos ------------------------------------------------------------------------------
    def photos(self) -> list[PhotoRow]:
        with self._lock:
            rows = self._db.execute("SELECT path, fingerprint, size, mtime_ns, width, height FROM photos "
                                    "ORDER BY path").fetchall()
        return [PhotoRow(*r) for r in rows]

    def skipped(self) -> dict[str, tuple[int, int, str]]:
        with self._lock:
            rows = self._db.execute("SELECT path, size, mtime_ns, reason FROM skipped").fetchall()
        return {p: (s, m, r) for p, s, m, r in rows}

    def replace_catalogue(self, photos: Sequence[PhotoRow], skipped: dict[str, tuple[int, int, str]]) -> None:
        with self.transaction() as db:
            db.execute("DELETE FROM photos")
            db.executemany("INSERT INTO photos VALUES (?, ?, ?, ?, ?, ?)",
                           [(p.path, p.fingerprint, p.size, p.mtime_ns, p.width, p.height) for p in photos])
            db.execute("DELETE FROM skipped")
            db.executemany("INSERT INTO skipped VALUES (?, ?, ?, ?)",
                           [(p, s, m, r) for p, (s, m, r) in skipped.items()])

    # -- embeddings --------------------------------------------------------------------------
    def embedded_fingerprints(self, extractor: str) -> set[str]:
        with self._lock:
            rows = self._db.execute("SELECT fingerprint FROM embeddings WHERE extractor=?", (extractor,))
            return {r[0] for r in rows}

    def put_embeddings(self, extractor: str, fingerprints: Sequence[str], vectors: np.ndarray) -> None:
        vectors = np.ascontiguousarray(vectors, dtype=np.float32)
        with self.transaction() as db:
            db.executemany("INSERT OR REPLACE INTO embeddings VALUES (?, ?, ?)",
                           [(fp, extractor, v.tobytes()) for fp, v in zip(fingerprints, vectors)])

    def embeddings(self, extractor: str, fingerprints: Sequence[str]) -> np.ndarray:
        """Rows in the order of `fingerprints`; every fingerprint must be embedded."""
        with self._lock:
            rows = dict(self._db.execute("SELECT fingerprint, vector FROM embeddings WHERE extractor=?",
                                         (extractor,)).fetchall())
        missing = [fp for fp in fingerprints if fp not in rows]
        if missing:
            raise StoreError(f"{len(missing)} photos have no embedding for {extractor}")
        if not fingerprints:
            return np.zeros((0, 0), np.float32)
        return np.stack([np.frombuffer(rows[fp], dtype=np.float32) for fp in fingerprints])

    # -- labels and decisions ----------------------------------------------------------------
    def labels(self) -> dict[str, LabelRow]:
        with self._lock:
            rows = self._db.execute("SELECT fingerprint, state, label, how, annotator, time FROM labels").fetchall()
        return {r[0]: LabelRow(*r) for r in rows}

    def record_decision(self, kind: str, annotator: str, photos: Sequence[str], changes: dict[str, LabelRow | None],
                        label: str | None = None, group_id: int | None = None, undoes: int | None = None,
                        close_proposals: Iterable[int] = (), rejected: Iterable[str] = ()) -> int:
        """Apply label changes ({fingerprint: new row or None to clear}) and log them, atomically.
        `rejected`: fingerprints the annotator said are not `label` (taken out of the group)."""
        with self.transaction() as db:
            before = {}
            for fp in changes:
                r = db.execute("SELECT fingerprint, state, label, how, annotator, time FROM labels "
                               "WHERE fingerprint=?", (fp,)).fetchone()
                before[fp] = list(r[1:]) if r else None
            for fp, row in changes.items():
                if row is None:
                    db.execute("DELETE FROM labels WHERE fingerprint=?", (fp,))
                else:
                    db.execute("INSERT OR REPLACE INTO labels VALUES (?, ?, ?, ?, ?, ?)",
                               (fp, row.state, row.label, row.how, row.annotator, row.time))
                db.execute("DELETE FROM deferred WHERE fingerprint=?", (fp,))
            cur = db.execute("INSERT INTO decisions(kind, label, annotator, time, group_id, photos, before, undoes) "
                             "VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                             (kind, label, annotator, utc_now(), group_id, json.dumps(list(photos)),
                              json.dumps(before), undoes))
            for gid in close_proposals:
                db.execute("UPDATE proposals SET open=0 WHERE id=?", (gid,))
            if label is not None:
                db.executemany("INSERT OR IGNORE INTO rejections VALUES (?, ?, ?)",
                               [(fp, label, cur.lastrowid) for fp in rejected])
            if undoes is not None:
                db.execute("DELETE FROM rejections WHERE decision=?", (undoes,))
            return cur.lastrowid

    def last_undoable_of(self, kinds: Sequence[str]):
        """The newest decision of one of `kinds` not yet undone, as (id, kind, before, group_id).
        Undo walks back: an undo is never itself undone."""
        marks = ",".join("?" * len(kinds))
        with self._lock:
            r = self._db.execute(
                f"SELECT id, kind, before, group_id FROM decisions d WHERE kind IN ({marks}) AND NOT EXISTS "
                "(SELECT 1 FROM decisions u WHERE u.undoes = d.id) ORDER BY id DESC LIMIT 1", tuple(kinds)).fetchone()
        return None if r is None else (r[0], r[1], json.loads(r[2]), r[3])

    def rejections(self) -> dict[str, set[str]]:
        with self._lock:
            rows = self._db.execute("SELECT fingerprint, label FROM rejections").fetchall()
        out: dict[str, set[str]] = {}
        for fp, lab in rows:
            out.setdefault(fp, set()).add(lab)
        return out

    def decision_count(self) -> int:
        with self._lock:
            return self._db.execute("SELECT COUNT(*) FROM decisions").fetchone()[0]

    def decisions(self) -> list[dict]:
        with self._lock:
            rows = self._db.execute("SELECT id, kind, label, annotator, time, group_id, photos, undoes "
                                    "FROM decisions ORDER BY id").fetchall()
        return [dict(id=r[0], kind=r[1], label=r[2], annotator=r[3], time=r[4], group_id=r[5],
                     photos=json.loads(r[6]), undoes=r[7]) for r in rows]

    def repin_proposal(self, group_id: int, close: Iterable[int] = ()) -> None:
        """Reopen a proposal so that it is shown first again (after an undo), closing `close`
        (the parts of an undone split) in the same transaction."""
        with self.transaction() as db:
            db.executemany("UPDATE proposals SET open=0 WHERE id=?", [(i,) for i in close])
            db.execute("UPDATE proposals SET open=1, pinned=1 WHERE id=?", (group_id,))

    # -- proposals ---------------------------------------------------------------------------
    def replace_open_proposals(self, groups: Sequence[dict]) -> list[int]:
        """Close every unpinned open proposal and store `groups`; returns their new ids."""
        with self.transaction() as db:
            db.execute("UPDATE proposals SET open=0 WHERE open=1 AND pinned=0")
            ids = []
            for g in groups:
                cur = db.execute("INSERT INTO proposals(members, trust, suggested_label, confidence, kind, pinned) "
                                 "VALUES (?, ?, ?, ?, ?, ?)",
                                 (json.dumps(g["members"]), g["trust"], g.get("suggested_label"),
                                  g.get("confidence"), g["kind"], int(g.get("pinned", False))))
                ids.append(cur.lastrowid)
            return ids

    def add_pinned_proposals(self, groups: Sequence[dict], close: int | None = None) -> list[int]:
        with self.transaction() as db:
            if close is not None:
                db.execute("UPDATE proposals SET open=0 WHERE id=?", (close,))
            ids = []
            for g in groups:
                cur = db.execute("INSERT INTO proposals(members, trust, suggested_label, confidence, kind, pinned) "
                                 "VALUES (?, ?, ?, ?, ?, 1)",
                                 (json.dumps(g["members"]), g["trust"], g.get("suggested_label"),
                                  g.get("confidence"), g["kind"]))
                ids.append(cur.lastrowid)
            return ids

    def proposal(self, group_id: int) -> ProposalRow | None:
        with self._lock:
            r = self._db.execute("SELECT id, members, trust, suggested_label, confidence, kind, pinned "
                                 "FROM proposals WHERE id=?", (group_id,)).fetchone()
        return _proposal_row(r) if r else None

    def open_proposals(self, pinned_only: bool = False) -> list[ProposalRow]:
        q = "SELECT id, members, trust, suggested_label, confidence, kind, pinned FROM proposals WHERE open=1"
        if pinned_only:
            q += " AND pinned=1"
        with self._lock:
            rows = self._db.execute(q + " ORDER BY pinned DESC, id").fetchall()
        return [_proposal_row(r) for r in rows]

    def is_open(self, group_id: int) -> bool:
        with self._lock:
            r = self._db.execute("SELECT open FROM proposals WHERE id=?", (group_id,)).fetchone()
        return bool(r and r[0])

    # -- deferred ----------------------------------------------------------------------------
    def defer(self, fingerprints: Iterable[str]) -> None:
        now = time.time()
        with self.transaction() as db:
            db.executemany("INSERT OR REPLACE INTO deferred VALUES (?, ?)", [(fp, now) for fp in fingerprints])

    def deferred(self) -> dict[str, float]:
        with self._lock:
            return dict(self._db.execute("SELECT fingerprint, time FROM deferred").fetchall())

    # -- relearned versions ------------------------------------------------------------------
    def add_relearn_version(self, extractor: str, settings: dict, figures: dict, state: bytes) -> int:
        with self.transaction() as db:
            db.execute("UPDATE relearn_versions SET active=0")
            cur = db.execute("INSERT INTO relearn_versions(time, extractor, settings, figures, state, active) "
                             "VALUES (?, ?, ?, ?, ?, 1)",
                             (utc_now(), extractor, json.dumps(settings), json.dumps(figures), state))
            return cur.lastrowid

    def relearn_versions(self) -> list[dict]:
        with self._lock:
            rows = self._db.execute("SELECT id, time, extractor, settings, figures, active FROM relearn_versions "
                                    "ORDER BY id").fetchall()
        return [dict(id=r[0], time=r[1], extractor=r[2], settings=json.loads(r[3]), figures=json.loads(r[4]),
                     active=bool(r[5])) for r in rows]

    def relearn_state(self, version: int) -> bytes:
        with self._lock:
            r = self._db.execute("SELECT state FROM relearn_versions WHERE id=?", (version,)).fetchone()
        if r is None:
            raise StoreError(f"no relearned version {version}")
        return r[0]

    def activate_relearn_version(self, version: int | None) -> None:
        """Make `version` the active one (None: go back to the plain backbone embedding)."""
        with self.transaction() as db:
            if version is not None and db.execute("SELECT 1 FROM relearn_versions WHERE id=?",
                                                  (version,)).fetchone() is None:
                raise StoreError(f"no relearned version {version}")
            db.execute("UPDATE relearn_versions SET active = (id IS ?)", (version,))

    def active_relearn_version(self) -> int | None:
        with self._lock:
            r = self._db.execute("SELECT id FROM relearn_versions WHERE active=1").fetchone()
        return r[0] if r else None


def _proposal_row(r) -> ProposalRow:
    return ProposalRow(id=r[0], members=json.loads(r[1]), trust=r[2], suggested_label=r[3],
                       confidence=r[4], kind=r[5], pinned=bool(r[6]))


def _split_sql(script: str) -> list[str]:
    # The migration scripts hold no ';' inside comments or strings, so a plain split is exact.
    return [s.strip() for s in script.split(";") if s.strip()]


class _Transaction:
    """`with store.transaction() as db:` — BEGIN IMMEDIATE ... COMMIT, ROLLBACK on error."""

    def __init__(self, db: sqlite3.Connection, lock: threading.RLock):
        self._db, self._lock = db, lock

    def __enter__(self) -> sqlite3.Connection:
        self._lock.acquire()
        try:
            self._db.execute("BEGIN IMMEDIATE")
        except BaseException:
            self._lock.release()
            raise
        return self._db

    def __exit__(self, exc_type, exc, tb):
        try:
            self._db.execute("ROLLBACK" if exc_type else "COMMIT")
        finally:
            self._lock.release()
        return False
