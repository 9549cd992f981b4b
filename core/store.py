"""The project store: one SQLite file (WAL mode) holding photos, embeddings, labels, the decision
log and the current proposals.

Labels are keyed by content fingerprint, so a renamed or moved photo keeps its label. Every write
method commits its own transaction before it returns, so a decision survives a crash; transactions
nest (`with store.transaction():` around several write methods makes them one), so a decision made of
several writes is all or nothing.

Safe to share between threads: one connection, and every access to it holds one lock.

A new store file is built under a temporary name and linked into place complete, so a store file that
exists is always a whole store: an empty or foreign file is reported as damaged, never overwritten.
Without write access (a read-only folder or mount) the store opens read-only: reading works, every
write raises `StoreError` with the reason.
"""
from __future__ import annotations

import json
import os
import secrets
import sqlite3
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Sequence

import numpy as np

SCHEMA_VERSION = 3
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
                                          -- (kind 'later': {fingerprint: previous deferred time or null})
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
    # 2 -> 3: embeddings in memory-mapped files beside the store (core/vectors.py); the BLOBs of the
    # embeddings table are moved into them by `Vectors.upgrade` when the project is opened.
    """
    CREATE TABLE vector_files (
        extractor TEXT PRIMARY KEY,
        token TEXT NOT NULL,              -- the file is vectors-<token>.f32 in the store folder
        dim INTEGER NOT NULL,
        rows INTEGER NOT NULL             -- rows written and committed
    );
    CREATE TABLE vector_rows (
        fingerprint TEXT NOT NULL,
        extractor TEXT NOT NULL,
        row INTEGER NOT NULL,
        PRIMARY KEY (fingerprint, extractor)
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

    def __init__(self, directory: Path, *, read_only: bool | None = None):
        """Open (or create) the store in `directory`. `read_only`: None decides from write access."""
        self.directory = Path(directory)
        self.path = self.directory / STORE_FILE
        self._lock = threading.RLock()
        self._depth = 0                   # nesting of open transactions (under the lock)
        self._pending: list[tuple] = []   # changes made by the open transaction, told after its commit
        self._marks: list[int] = []       # len(_pending) at each open savepoint
        self._listeners: list = []
        self._db: sqlite3.Connection | None = None
        self._vectors = None
        existed = self.path.exists()
        if existed and not self.path.is_file():
            raise StoreError(f"{self.path} is not a file; move it away so Kinfold can keep its store there")
        if read_only is None:
            read_only = existed and not (os.access(self.path, os.W_OK) and os.access(self.directory, os.W_OK))
        self.read_only = read_only
        if not existed:
            if read_only:
                raise StoreError(f"there is no project store at {self.directory}, and it cannot be created read-only")
            self._create()
        elif self.path.stat().st_size == 0:
            raise StoreError(f"the project store {self.path} is empty (0 bytes): it is damaged. Restore it from a "
                             "backup, or move it away to start the project afresh.")
        elif not read_only:
            # A process killed between linking its new store into place and removing the temporary
            # name left that name behind; only this check, at every open, ever sees it again.
            _remove_stale_temporaries(self.directory)
        try:
            self._db = self._connect_read_only() if read_only else self._connect()
            self._migrate()
        except sqlite3.DatabaseError as exc:
            self.close()
            text = str(exc)
            if "locked" in text or "busy" in text:
                raise StoreError(f"the project store {self.path} is busy in another process ({text}); "
                                 "try again") from exc
            if "unable to open" in text:
                raise StoreError(f"cannot open the project store {self.path} ({text}); check that it can "
                                 "be read") from exc
            raise StoreError(f"the project store {self.path} is damaged or not a Kinfold store ({text}); restore it "
                             "from a backup, or move it away to start the project afresh.") from exc
        except BaseException:
            self.close()
            raise

    # -- opening and the schema --------------------------------------------------------------
    def _connect(self) -> sqlite3.Connection:
        return sqlite3.connect(self.path, check_same_thread=False, isolation_level=None, timeout=_BUSY_SECONDS)

    def _connect_read_only(self) -> sqlite3.Connection:
        """Read without write access. A WAL database opened read-only needs its -shm file; without one
        (a clean close deletes it) only `immutable=1` opens it, which ignores the -wal file, so that is
        used only when there is no -wal content to miss."""
        uri = self.path.resolve().as_uri()
        db = sqlite3.connect(f"{uri}?mode=ro", uri=True, check_same_thread=False, isolation_level=None)
        try:
            db.execute("SELECT count(*) FROM sqlite_master").fetchone()
            return db
        except sqlite3.OperationalError:
            db.close()
        wal = self.path.with_name(self.path.name + "-wal")
        if wal.exists() and wal.stat().st_size > 0:
            raise StoreError(f"the project store {self.path} cannot be read without write access: its last "
                             f"changes are still in {wal.name}. Open it once where it is writable.")
        db = sqlite3.connect(f"{uri}?mode=ro&immutable=1", uri=True, check_same_thread=False, isolation_level=None)
        db.execute("SELECT count(*) FROM sqlite_master").fetchone()
        return db

    def _create(self) -> None:
        """Build a new store under a temporary name and link it into place, so the store file never
        exists half made (a crash or a second process sees either nothing or a whole store)."""
        try:
            self.directory.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise StoreError(f"cannot create the project store at {self.directory}: {exc.strerror}. "
                             "Choose a writable store location (store=...).") from exc
        _remove_stale_temporaries(self.directory)
        tmp = self.directory / f".{STORE_FILE}.new-{os.getpid()}-{secrets.token_hex(4)}"
        try:
            db = sqlite3.connect(tmp, isolation_level=None)
            try:
                db.execute("PRAGMA journal_mode=WAL")
                db.execute("BEGIN IMMEDIATE")
                for script in _MIGRATIONS:
                    for stmt in _split_sql(script):
                        db.execute(stmt)
                db.execute(f"PRAGMA user_version={SCHEMA_VERSION}")
                db.execute("COMMIT")
            finally:
                db.close()  # the last connection checkpoints the WAL into the file and deletes it
            try:
                os.link(tmp, self.path)
            except FileExistsError:
                pass  # another process made the store first: use that one
            except OSError:
                # No hard links on this file system: rename, which could replace a store made in the
                # same instant by another process (it would still be a new, empty one).
                if not self.path.exists():
                    os.replace(tmp, self.path)
        except (OSError, sqlite3.Error) as exc:
            raise StoreError(f"cannot create the project store at {self.directory}: "
                             f"{getattr(exc, 'strerror', None) or exc}. Choose a writable store location "
                             "(store=..., --store).") from exc
        finally:
            for leftover in (tmp, tmp.with_name(tmp.name + "-wal"), tmp.with_name(tmp.name + "-shm")):
                leftover.unlink(missing_ok=True)

    def _migrate(self) -> None:
        version = self.schema_version()
        if version > SCHEMA_VERSION:
            raise StoreError(f"{self.path} was written by a newer Kinfold (schema {version}, "
                             f"this one knows {SCHEMA_VERSION}); upgrade Kinfold to open it.")
        if version == 0:
            # Kinfold links only whole stores into place, so an existing file without a schema was
            # never one of its stores, or lost its content.
            raise StoreError(f"the project store {self.path} holds no Kinfold project (an empty or foreign "
                             "database): it is damaged. Restore it from a backup, or move it away to start afresh.")
        if not self.read_only:
            # Only now that the file is known to be a Kinfold store may anything be written to it.
            db = self._conn()
            db.execute("PRAGMA journal_mode=WAL")
            db.execute("PRAGMA synchronous=NORMAL")  # WAL + NORMAL: durable against app crashes
            db.execute("PRAGMA foreign_keys=ON")
        if version == SCHEMA_VERSION:
            return
        if self.read_only:
            raise StoreError(f"{self.path} was written by an older Kinfold (schema {version}); open it once "
                             "with write access so it can be upgraded.")
        # BEGIN IMMEDIATE, then read the version again: of two processes upgrading at once, the second
        # waits for the first and then finds nothing left to do.
        with self.transaction() as db:
            version = db.execute("PRAGMA user_version").fetchone()[0]
            for v in range(version, SCHEMA_VERSION):
                for stmt in _split_sql(_MIGRATIONS[v]):
                    db.execute(stmt)
                db.execute(f"PRAGMA user_version={v + 1}")

    def close(self) -> None:
        with self._lock:
            if self._db is not None:
                self._db.close()
                self._db = None

    def _conn(self) -> sqlite3.Connection:
        """The connection; the caller holds the lock."""
        if self._db is None:
            raise StoreError(f"the project store {self.path} is closed")
        return self._db

    def _all(self, sql: str, params: Sequence = ()) -> list:
        with self._lock:
            return self._conn().execute(sql, params).fetchall()

    def _one(self, sql: str, params: Sequence = ()):
        with self._lock:
            return self._conn().execute(sql, params).fetchone()

    def transaction(self):
        """`with store.transaction() as db:` one transaction (BEGIN IMMEDIATE ... COMMIT, ROLLBACK on
        error), holding the lock throughout; nested inside another, it is a savepoint of the outer one."""
        return _Transaction(self)

    def after_commit(self, listener) -> None:
        """Call `listener(changes)` after every committed transaction that changed labels, rejections,
        deferred photos or the catalogue, with the list of what it changed, in order:
        ("labels", {fingerprint: LabelRow or None}) — also clears those photos' deferred marks;
        ("rejected", [(fingerprint, label), ...]) added, ("unrejected", [...]) removed;
        ("deferred", {fingerprint: time or None}); ("decision", kind); ("catalogue",).
        A rolled-back transaction tells nothing. Listeners run under the store's lock, in the thread
        that committed; one that raises does not undo the commit."""
        with self._lock:
            self._listeners.append(listener)

    def _note(self, change: tuple) -> None:
        """Remember a change of the open transaction (the caller holds the lock inside one)."""
        self._pending.append(change)

    def schema_version(self) -> int:
        return self._one("PRAGMA user_version")[0]

    # -- settings ----------------------------------------------------------------------------
    def get_setting(self, key: str, default=None):
        row = self._one("SELECT value FROM settings WHERE key=?", (key,))
        return json.loads(row[0]) if row else default

    def set_setting(self, key: str, value) -> None:
        with self.transaction() as db:
            db.execute("INSERT OR REPLACE INTO settings(key, value) VALUES (?, ?)", (key, json.dumps(value)))

    # -- photos ------------------------------------------------------------------------------
    def photos(self) -> list[PhotoRow]:
        with self._lock:
            rows = self._conn().execute("SELECT path, fingerprint, size, mtime_ns, width, height FROM photos "
                                    "ORDER BY path").fetchall()
        return [PhotoRow(*r) for r in rows]

    def catalogue(self, extractor: str) -> list[PhotoRow]:
        """The photos embedded with `extractor`, by path: a project's catalogue (one indexed join)."""
        with self._lock:
            rows = self._conn().execute("SELECT p.path, p.fingerprint, p.size, p.mtime_ns, p.width, p.height "
                                        "FROM photos p JOIN vector_rows e ON e.fingerprint = p.fingerprint "
                                        "AND e.extractor = ? ORDER BY p.path", (extractor,)).fetchall()
        return [PhotoRow(*r) for r in rows]

    def skipped_count(self) -> int:
        return self._one("SELECT COUNT(*) FROM skipped")[0]

    def skipped(self) -> dict[str, tuple[int, int, str]]:
        with self._lock:
            rows = self._conn().execute("SELECT path, size, mtime_ns, reason FROM skipped").fetchall()
        return {p: (s, m, r) for p, s, m, r in rows}

    def replace_catalogue(self, photos: Sequence[PhotoRow], skipped: dict[str, tuple[int, int, str]]) -> None:
        with self.transaction() as db:
            db.execute("DELETE FROM photos")
            db.executemany("INSERT INTO photos VALUES (?, ?, ?, ?, ?, ?)",
                           [(p.path, p.fingerprint, p.size, p.mtime_ns, p.width, p.height) for p in photos])
            db.execute("DELETE FROM skipped")
            db.executemany("INSERT INTO skipped VALUES (?, ?, ?, ?)",
                           [(p, s, m, r) for p, (s, m, r) in skipped.items()])
            self._note(("catalogue",))

    # -- embeddings --------------------------------------------------------------------------
    # Kept in memory-mapped files beside the store; core/vectors.py has the layout and the rules.
    @property
    def vectors(self):
        if self._vectors is None:
            from core.vectors import Vectors

            self._vectors = Vectors(self)
        return self._vectors

    def embedded_fingerprints(self, extractor: str) -> set[str]:
        return self.vectors.fingerprints(extractor)

    def put_embeddings(self, extractor: str, fingerprints: Sequence[str], vectors: np.ndarray) -> None:
        self.vectors.put(extractor, list(fingerprints), vectors)

    def embeddings(self, extractor: str, fingerprints: Sequence[str]) -> np.ndarray:
        """Rows in the order of `fingerprints` (a memory map when they are the file's rows in order);
        every fingerprint must be embedded."""
        from core.vectors import VectorError

        try:
            return self.vectors.matrix(extractor, list(fingerprints))
        except VectorError as exc:
            raise StoreError(str(exc)) from exc

    # -- labels and decisions ----------------------------------------------------------------
    def labels(self) -> dict[str, LabelRow]:
        with self._lock:
            rows = self._conn().execute("SELECT fingerprint, state, label, how, annotator, time FROM labels").fetchall()
        return {r[0]: LabelRow(*r) for r in rows}

    def record_decision(self, kind: str, annotator: str, photos: Sequence[str], changes: dict[str, LabelRow | None],
                        label: str | None = None, group_id: int | None = None, undoes: int | None = None,
                        close_proposals: Iterable[int] = (), rejected: Iterable[str] = (),
                        before: dict | None = None) -> int:
        """Apply label changes ({fingerprint: new row or None to clear}) and log them, atomically.
        `rejected`: fingerprints the annotator said are not `label` (taken out of the group).
        `before`: what undo needs for a decision that changes no label (kind 'later')."""
        with self.transaction() as db:
            before = dict(before or {})
            fps = list(changes)
            was = {}
            for s in range(0, len(fps), 900):              # under SQLite's oldest limit of 999 parameters
                part = fps[s:s + 900]
                was.update((r[0], list(r[1:])) for r in db.execute(
                    "SELECT fingerprint, state, label, how, annotator, time FROM labels WHERE fingerprint IN "
                    f"({','.join('?' * len(part))})", part))
            before.update((fp, was.get(fp)) for fp in fps)
            db.executemany("DELETE FROM labels WHERE fingerprint=?", [(fp,) for fp, row in changes.items() if row is None])
            db.executemany("INSERT OR REPLACE INTO labels VALUES (?, ?, ?, ?, ?, ?)",
                           [(fp, row.state, row.label, row.how, row.annotator, row.time)
                            for fp, row in changes.items() if row is not None])
            db.executemany("DELETE FROM deferred WHERE fingerprint=?", [(fp,) for fp in fps])
            cur = db.execute("INSERT INTO decisions(kind, label, annotator, time, group_id, photos, before, undoes) "
                             "VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                             (kind, label, annotator, utc_now(), group_id, json.dumps(list(photos)),
                              json.dumps(before), undoes))
            for gid in close_proposals:
                db.execute("UPDATE proposals SET open=0 WHERE id=?", (gid,))
            self._note(("labels", dict(changes)))
            if label is not None:
                pairs = sorted({(fp, label) for fp in rejected})
                db.executemany("INSERT OR IGNORE INTO rejections VALUES (?, ?, ?)",
                               [(fp, lab, cur.lastrowid) for fp, lab in pairs])
                if pairs:
                    self._note(("rejected", pairs))
            if undoes is not None:
                gone = db.execute("SELECT fingerprint, label FROM rejections WHERE decision=?", (undoes,)).fetchall()
                db.execute("DELETE FROM rejections WHERE decision=?", (undoes,))
                if gone:
                    self._note(("unrejected", [tuple(r) for r in gone]))
            self._note(("decision", kind))
            return cur.lastrowid

    def last_undoable_of(self, kinds: Sequence[str]):
        """The newest decision of one of `kinds` not yet undone, as (id, kind, before, group_id).
        Undo walks back: an undo is never itself undone."""
        marks = ",".join("?" * len(kinds))
        with self._lock:
            r = self._conn().execute(
                f"SELECT id, kind, before, group_id FROM decisions d WHERE kind IN ({marks}) AND NOT EXISTS "
                "(SELECT 1 FROM decisions u WHERE u.undoes = d.id) ORDER BY id DESC LIMIT 1", tuple(kinds)).fetchone()
        return None if r is None else (r[0], r[1], json.loads(r[2]), r[3])

    def rejections(self) -> dict[str, set[str]]:
        with self._lock:
            rows = self._conn().execute("SELECT fingerprint, label FROM rejections").fetchall()
        out: dict[str, set[str]] = {}
        for fp, lab in rows:
            out.setdefault(fp, set()).add(lab)
        return out

    def rejection_pairs(self) -> list[tuple[str, str]]:
        """Every (fingerprint, label) 'not this label' row, once per decision that said it."""
        with self._lock:
            return [tuple(r) for r in self._conn().execute("SELECT fingerprint, label FROM rejections")]

    def decision_count(self, actions_only: bool = False) -> int:
        """Decisions logged; `actions_only`: leaving out undos (an undo takes an action back, it is
        not one — the figure the window's chart and `status` show)."""
        q = "SELECT COUNT(*) FROM decisions" + (" WHERE kind != 'undo'" if actions_only else "")
        with self._lock:
            return self._conn().execute(q).fetchone()[0]

    def decisions(self, after: int = 0) -> list[dict]:
        """The logged decisions in order; `after`: only those with a larger id (the ones logged since)."""
        with self._lock:
            rows = self._conn().execute("SELECT id, kind, label, annotator, time, group_id, photos, undoes "
                                    "FROM decisions WHERE id > ? ORDER BY id", (after,)).fetchall()
        return [dict(id=r[0], kind=r[1], label=r[2], annotator=r[3], time=r[4], group_id=r[5],
                     photos=json.loads(r[6]), undoes=r[7]) for r in rows]

    def repin_proposal(self, group_id: int, close: Iterable[int] = ()) -> None:
        """Reopen a proposal so that it is shown first again (after an undo), closing `close`
        (the parts of an undone split) in the same transaction."""
        with self.transaction() as db:
            db.executemany("UPDATE proposals SET open=0 WHERE id=?", [(i,) for i in close])
            db.execute("UPDATE proposals SET open=1, pinned=1 WHERE id=?", (group_id,))

    # -- proposals ---------------------------------------------------------------------------
    def update_open_proposals(self, close: Iterable[int], groups: Sequence[dict]) -> list[int]:
        """Close the open proposals `close` (no longer valid) and store `groups`; returns their new
        ids. Every other open proposal keeps its id."""
        with self.transaction() as db:
            db.executemany("UPDATE proposals SET open=0 WHERE id=?", [(i,) for i in close])
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
            r = self._conn().execute("SELECT id, members, trust, suggested_label, confidence, kind, pinned "
                                 "FROM proposals WHERE id=?", (group_id,)).fetchone()
        return _proposal_row(r) if r else None

    def open_proposals(self, pinned_only: bool = False) -> list[ProposalRow]:
        q = "SELECT id, members, trust, suggested_label, confidence, kind, pinned FROM proposals WHERE open=1"
        if pinned_only:
            q += " AND pinned=1"
        with self._lock:
            rows = self._conn().execute(q + " ORDER BY pinned DESC, id").fetchall()
        return [_proposal_row(r) for r in rows]

    def is_open(self, group_id: int) -> bool:
        with self._lock:
            r = self._conn().execute("SELECT open FROM proposals WHERE id=?", (group_id,)).fetchone()
        return bool(r and r[0])

    # -- deferred ----------------------------------------------------------------------------
    def defer(self, fingerprints: Iterable[str]) -> dict[str, float | None]:
        """Leave photos for later; returns their previous deferred times (None: not deferred), for undo."""
        now = time.time()
        with self.transaction() as db:
            previous = {}
            for fp in fingerprints:
                r = db.execute("SELECT time FROM deferred WHERE fingerprint=?", (fp,)).fetchone()
                previous[fp] = r[0] if r else None
            db.executemany("INSERT OR REPLACE INTO deferred VALUES (?, ?)", [(fp, now) for fp in previous])
            self._note(("deferred", {fp: now for fp in previous}))
            return previous

    def restore_deferred(self, previous: dict[str, float | None]) -> None:
        """Put deferred times back as `defer` found them."""
        with self.transaction() as db:
            for fp, t in previous.items():
                if t is None:
                    db.execute("DELETE FROM deferred WHERE fingerprint=?", (fp,))
                else:
                    db.execute("INSERT OR REPLACE INTO deferred VALUES (?, ?)", (fp, t))
            self._note(("deferred", dict(previous)))

    def deferred(self) -> dict[str, float]:
        with self._lock:
            return dict(self._conn().execute("SELECT fingerprint, time FROM deferred").fetchall())

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
            rows = self._conn().execute("SELECT id, time, extractor, settings, figures, active FROM relearn_versions "
                                    "ORDER BY id").fetchall()
        return [dict(id=r[0], time=r[1], extractor=r[2], settings=json.loads(r[3]), figures=json.loads(r[4]),
                     active=bool(r[5])) for r in rows]

    def relearn_state(self, version: int) -> bytes:
        with self._lock:
            r = self._conn().execute("SELECT state FROM relearn_versions WHERE id=?", (version,)).fetchone()
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
            r = self._conn().execute("SELECT id FROM relearn_versions WHERE active=1").fetchone()
        return r[0] if r else None

    def taken_out_counts(self) -> dict[int, int]:
        """Decision id -> photos taken out of the group it accepted (for the statistics)."""
        with self._lock:
            rows = self._conn().execute("SELECT decision, COUNT(*) FROM rejections GROUP BY decision").fetchall()
        return {r[0]: r[1] for r in rows}


def _proposal_row(r) -> ProposalRow:
    return ProposalRow(id=r[0], members=json.loads(r[1]), trust=r[2], suggested_label=r[3],
                       confidence=r[4], kind=r[5], pinned=bool(r[6]))


def _split_sql(script: str) -> list[str]:
    # The migration scripts hold no ';' inside comments or strings, so a plain split is exact.
    return [s.strip() for s in script.split(";") if s.strip()]


def _remove_stale_temporaries(directory: Path) -> None:
    """Delete stores left half made by a process that died while creating one."""
    for tmp in directory.glob(f".{STORE_FILE}.new-*"):
        try:
            pid = int(tmp.name.split(".new-")[1].split("-")[0])
            os.kill(pid, 0)
        except ProcessLookupError:
            tmp.unlink(missing_ok=True)
        except (ValueError, IndexError, OSError):
            pass  # not ours to judge, or the process lives


_BUSY_SECONDS = 30.0    # how long a write waits for another process's transaction before giving up


class _Transaction:
    """BEGIN IMMEDIATE ... COMMIT (ROLLBACK on error) holding the store's lock; inside another
    transaction of the same thread, a SAVEPOINT that joins it."""

    def __init__(self, store: Store):
        self._store = store

    def __enter__(self) -> sqlite3.Connection:
        st = self._store
        st._lock.acquire()
        try:
            db = st._conn()
            if st.read_only:
                raise StoreError(f"the project store {st.directory} is read-only (no write access): reading "
                                 "(status, export) works, changing the project does not")
            if st._depth == 0:
                try:
                    db.execute("BEGIN IMMEDIATE")
                except sqlite3.OperationalError as exc:
                    raise StoreError(f"the project store {st.path} is busy or cannot be written ({exc}); "
                                     "try again") from exc
            else:
                db.execute(f"SAVEPOINT s{st._depth}")
                st._marks.append(len(st._pending))
            st._depth += 1
        except BaseException:
            st._lock.release()
            raise
        return db

    def __exit__(self, exc_type, exc, tb):
        st = self._store
        try:
            st._depth -= 1
            db = st._conn()
            if st._depth > 0:
                mark = st._marks.pop()
                if exc_type:
                    db.execute(f"ROLLBACK TO s{st._depth}")
                    del st._pending[mark:]
                db.execute(f"RELEASE s{st._depth}")
            elif exc_type:
                st._pending.clear()
                db.execute("ROLLBACK")
            else:
                changes, st._pending = st._pending, []
                try:
                    db.execute("COMMIT")
                except sqlite3.Error as err:
                    db.execute("ROLLBACK")
                    raise StoreError(f"could not save to the project store {st.path}: {err}") from err
                if changes:
                    for listener in list(st._listeners):
                        listener(changes)
        finally:
            st._lock.release()
        return False
