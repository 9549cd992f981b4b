"""The store and the decisions under faults: half-made decisions, damaged files, two processes at
once, no write access, several threads (issue 17: "Nothing lost, nothing hung")."""
import json
import multiprocessing
import os
import shutil
import sqlite3
import stat
import subprocess
import sys
import threading
from pathlib import Path

import numpy as np
import pytest

from core import project as project_module
from core.project import Project, ProjectError
from core.store import _MIGRATIONS, SCHEMA_VERSION, STORE_FILE, Store, StoreError, _split_sql

ROOT = Path(__file__).resolve().parent.parent


def _cli(*args, **kw):
    return subprocess.run([sys.executable, "-m", "app.cli", *map(str, args)], capture_output=True, text=True,
                          cwd=ROOT, env={**os.environ, "PYTHONPATH": str(ROOT)}, timeout=300, **kw)


def _snapshot(p: Project) -> dict:
    """Everything a decision can touch, read straight from the SQLite file."""
    db = p.store._conn()
    return {t: sorted(map(repr, db.execute(f"SELECT * FROM {t}").fetchall()))
            for t in ("labels", "decisions", "proposals", "deferred", "rejections")}


def _fail(monkeypatch, cls, name):
    def boom(*a, **k):
        raise RuntimeError("injected failure")
    monkeypatch.setattr(cls, name, boom)


# -- 4. one decision, one transaction -----------------------------------------------------------
def test_split_failing_half_way_leaves_nothing_half_done(photo_project_folder, monkeypatch):
    with Project.open(photo_project_folder) as p:
        mixed = p.photos()[::3]
        gid = p.store.update_open_proposals((), [dict(members=mixed, trust=0.5, kind="new area")])[0]
        before = _snapshot(p)
        # The split's log entry is written, then storing its parts fails.
        _fail(monkeypatch, Store, "add_pinned_proposals")
        with pytest.raises(RuntimeError):
            p.split(gid)
        assert _snapshot(p) == before
        monkeypatch.undo()
        parts = p.split(gid)
        assert len(parts) == 2 and p.store.decisions()[-1]["kind"] == "split"


def test_undo_failing_half_way_leaves_nothing_half_done(photo_project_folder, monkeypatch):
    with Project.open(photo_project_folder) as p:
        g = p.propose(limit=3)[0]
        p.accept(g.id, "cat")
        before = _snapshot(p)
        # The labels are put back and logged, then reopening the group fails.
        _fail(monkeypatch, Store, "repin_proposal")
        with pytest.raises(RuntimeError):
            p.undo()
        assert _snapshot(p) == before
        assert p.status().labelled == len(g.members)
        monkeypatch.undo()
        assert p.undo()["photos"] == len(g.members)
        assert p.status().labelled == 0 and p.propose(limit=1)[0].id == g.id


def test_later_failing_half_way_leaves_nothing_half_done(photo_project_folder, monkeypatch):
    with Project.open(photo_project_folder) as p:
        g = p.propose(limit=3)[0]
        before = _snapshot(p)
        # The photos are marked for later, then logging the decision fails.
        real = Store.record_decision

        def failing(self, kind, *a, **k):
            if kind == "later":
                raise RuntimeError("injected failure")
            return real(self, kind, *a, **k)
        monkeypatch.setattr(Store, "record_decision", failing)
        with pytest.raises(RuntimeError):
            p.defer(g.id)
        assert _snapshot(p) == before and p.store.is_open(g.id)


def test_later_is_logged_and_undo_brings_the_group_back(photo_project_folder):
    with Project.open(photo_project_folder) as p:
        first, second = p.propose(limit=3)[:2]
        p.accept(second.id, "rocket")
        p.defer(first.id)
        assert [d["kind"] for d in p.store.decisions()] == ["accept", "later"]
        assert first.id not in [g.id for g in p.propose(limit=20)]
        assert set(p.store.deferred()) == {p.photo_info(m)["fingerprint"] for m in first.members}
        done = p.undo()
        assert done["kind"] == "later" and done["photos"] == len(first.members)
        assert p.store.deferred() == {}
        again = p.propose(limit=3)
        assert again[0].id == first.id and again[0].members == first.members
        # Undo goes on walking back: the accept before the later.
        assert p.undo()["kind"] == "accept" and p.status().labelled == 0


# -- 7. the graph cache ------------------------------------------------------------------------
def _damage(path: Path, how: str) -> None:
    good = path.read_bytes()
    if how == "truncated":
        path.write_bytes(good[: len(good) // 2])        # BadZipFile
    elif how == "empty":
        path.write_bytes(b"")                           # EOFError
    elif how == "garbage":
        path.write_bytes(os.urandom(4096))
    elif how == "zip header only":
        path.write_bytes(good[:64])
    elif how == "pickled objects":
        np.savez(path.with_suffix(""), x=np.array([object()], dtype=object))
    elif how == "wrong shapes":
        with np.load(path) as z:
            arrays = {k: z[k] for k in z.files}
        arrays["idx"] = arrays["idx"][:-1]
        np.savez(path.with_suffix(""), **arrays)
    elif how == "missing field":
        with np.load(path) as z:
            arrays = {k: z[k] for k in z.files if k != "burst"}
        np.savez(path.with_suffix(""), **arrays)


@pytest.mark.parametrize("how", ["truncated", "empty", "garbage", "zip header only", "pickled objects",
                                 "wrong shapes", "missing field"])
def test_damaged_graph_cache_is_dropped_and_rebuilt(photo_project_folder, tmp_path, how):
    with Project.open(photo_project_folder) as p:
        g = p.propose(limit=3)[0]
        p.accept(g.id, "cat")
        reference = p.graph()
    cache = next((photo_project_folder / ".kinfold").glob("graph-*.npz"))
    _damage(cache, how)
    with Project.open(photo_project_folder) as p:
        assert p.propose(limit=3)
        assert len(p.labelled_photos()) == len(g.members)
        rebuilt = p.graph()
        assert np.array_equal(rebuilt.idx, reference.idx)
    with np.load(cache) as z:                            # the cache on disk is whole again
        assert np.array_equal(z["idx"], reference.idx)
    # The CLI, as used: propose and export work.
    assert _cli("propose", photo_project_folder, "--json", "--limit", "1").returncode == 0
    _damage(cache, how)
    out = _cli("export", photo_project_folder, "--csv", tmp_path / "labels.csv")
    assert out.returncode == 0, out.stderr
    assert (tmp_path / "labels.csv").read_text().count("\n") == len(g.members) + 1


def test_graph_cache_key_covers_its_settings_and_features(photo_project_folder, monkeypatch):
    store_dir = photo_project_folder / ".kinfold"
    with Project.open(photo_project_folder) as p:
        n = len(p.photos())
        assert p.graph().idx.shape[1] == n - 1
        first = {f.name for f in store_dir.glob("graph-*.npz")}
    assert len(first) == 1
    # Another k: a cache built with k = 64 must not be served.
    monkeypatch.setitem(project_module._GRAPH_SETTINGS, "k", 5)
    with Project.open(photo_project_folder) as p:
        assert p.graph().idx.shape[1] == 5
        second = {f.name for f in store_dir.glob("graph-*.npz")}
    assert second.isdisjoint(first)
    # Another temperature: the entropy changes, so must the cache.
    monkeypatch.setitem(project_module._GRAPH_SETTINGS, "temperature", 0.5)
    with Project.open(photo_project_folder) as p:
        hot = p.graph().entropy
        third = {f.name for f in store_dir.glob("graph-*.npz")}
    assert third.isdisjoint(second)
    monkeypatch.setitem(project_module._GRAPH_SETTINGS, "temperature", 0.1)
    with Project.open(photo_project_folder) as p:
        assert not np.allclose(p.graph().entropy, hot)
        # Other features (a relearned head adapting the embedding): another cache.
        feats = p.features().copy()
        monkeypatch.setattr(Project, "features", lambda self: feats[:, ::-1].copy())
        p._graph = None
        p.graph()
        fourth = {f.name for f in store_dir.glob("graph-*.npz")}
    assert fourth.isdisjoint(third | second | first)


# -- 8. an empty or damaged store file ---------------------------------------------------------
@pytest.mark.parametrize("content", [b"", b"this is not a database" * 200, "empty sqlite"])
def test_empty_or_garbage_store_is_reported_damaged_and_kept(tmp_path, content):
    folder = tmp_path / "photos"
    (folder / ".kinfold").mkdir(parents=True)
    store = folder / ".kinfold" / STORE_FILE
    if content == "empty sqlite":
        sqlite3.connect(store).execute("CREATE TABLE other(x)").connection.close()
    else:
        store.write_bytes(content)
    before = store.read_bytes()
    with pytest.raises(ProjectError, match="damaged"):
        Project.open(folder)
    assert store.read_bytes() == before                  # nothing overwritten
    out = _cli("status", folder)
    assert out.returncode == 1 and "damaged" in out.stderr
    assert len(out.stderr.strip().splitlines()) == 1 and "Traceback" not in out.stderr


def test_a_new_store_is_created_whole(tmp_path):
    st = Store(tmp_path / "s")
    assert st.schema_version() == SCHEMA_VERSION
    st.close()
    assert sorted(p.name for p in (tmp_path / "s").iterdir()) == [STORE_FILE]   # no temporary left
    # A temporary left by a process killed while creating a store is cleaned up.
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    (tmp_path / "t").mkdir()
    (tmp_path / "t" / f".{STORE_FILE}.new-{dead.pid}-abcd").write_bytes(b"half")
    Store(tmp_path / "t").close()
    assert sorted(p.name for p in (tmp_path / "t").iterdir()) == [STORE_FILE]


_KILLED_CREATION = r"""
import os, signal, sys
from pathlib import Path
from core import store
real_unlink = Path.unlink

def unlink(self, *args, **kwargs):   # the store is linked into place; its temporary not yet removed
    if ".new-" in self.name:
        os.kill(os.getpid(), signal.SIGKILL)
    return real_unlink(self, *args, **kwargs)

Path.unlink = unlink
store.Store(Path(sys.argv[1]))
"""


def test_store_creation_killed_after_linking_leaves_no_temporary(tmp_path):
    """SIGKILL between linking a new store into place and removing its temporary name: the next open
    (of the store that now exists) removes the temporary."""
    d = tmp_path / "s"
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parent.parent))
    proc = subprocess.run([sys.executable, "-c", _KILLED_CREATION, str(d)], env=env, capture_output=True, timeout=60)
    assert proc.returncode == -9, proc.stderr
    assert any(".new-" in p.name for p in d.iterdir())     # the kill left it
    st = Store(d)
    assert st.schema_version() == SCHEMA_VERSION
    st.close()
    assert sorted(p.name for p in d.iterdir()) == [STORE_FILE]


# -- 9. two processes opening a new store at once ---------------------------------------------
def _open_in_step(directories, barrier, results):
    for d in directories:
        barrier.wait()
        try:
            st = Store(Path(d))
            results.put((d, st.schema_version()))
            st.close()
        except Exception as exc:  # reported to the test, which names it
            results.put((d, f"{type(exc).__name__}: {exc}"))


def _schema_1_store(directory: Path) -> None:
    directory.mkdir(parents=True)
    db = sqlite3.connect(directory / STORE_FILE, isolation_level=None)
    db.execute("PRAGMA journal_mode=WAL")
    for stmt in _split_sql(_MIGRATIONS[0]):
        db.execute(stmt)
    db.execute("PRAGMA user_version=1")
    db.close()


@pytest.mark.parametrize("start", ["new", "older schema"])
def test_two_processes_opening_a_store_at_once(tmp_path, start):
    rounds = 40
    dirs = [str(tmp_path / f"store{i}") for i in range(rounds)]
    if start == "older schema":
        for d in dirs:
            _schema_1_store(Path(d))
    ctx = multiprocessing.get_context("spawn")
    barrier, results = ctx.Barrier(2), ctx.Queue()
    procs = [ctx.Process(target=_open_in_step, args=(dirs, barrier, results)) for _ in range(2)]
    for pr in procs:
        pr.start()
    got = [results.get(timeout=120) for _ in range(2 * rounds)]
    for pr in procs:
        pr.join(timeout=60)
    assert [r for r in got if r[1] != SCHEMA_VERSION] == []
    for d in dirs:
        db = sqlite3.connect(Path(d) / STORE_FILE)
        assert db.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert db.execute("SELECT count(*) FROM sqlite_master WHERE name='photos'").fetchone()[0] == 1
        db.close()


# -- 16. a read-only store ---------------------------------------------------------------------
def _without_write_access():
    """How to run a command that has no write access to files it does not own the right to: as root,
    drop the capabilities that let root write anywhere; otherwise plain file modes suffice."""
    if os.geteuid() != 0:
        return []
    if shutil.which("setpriv") is None:
        pytest.skip("running as root without setpriv: cannot take write access away")
    return ["setpriv", "--bounding-set", "-dac_override,-dac_read_search,-fowner"]


def _make_read_only(paths):
    for p in paths:
        mode = p.stat().st_mode
        p.chmod(mode & ~(stat.S_IWUSR | stat.S_IWGRP | stat.S_IWOTH))


def _cli_ro(prefix, *args):
    return subprocess.run([*prefix, sys.executable, "-m", "app.cli", *map(str, args)], capture_output=True,
                          text=True, cwd=ROOT, env={**os.environ, "PYTHONPATH": str(ROOT)}, timeout=300)


@pytest.mark.parametrize("state", ["closed cleanly", "changes still in the -wal file"])
def test_read_only_store_reads_and_refuses_writes_with_a_reason(photo_project_folder, tmp_path, state):
    prefix = _without_write_access()
    store_dir = photo_project_folder / ".kinfold"
    with Project.open(photo_project_folder) as p:
        g = p.propose(limit=3)[0]
        p.accept(g.id, "cat")
        open_ids = [x.id for x in p.propose(limit=10)]
        if state != "closed cleanly":
            # A copy taken while the project is open: its last decision is only in -wal and -shm.
            copy = tmp_path / "copy"
            shutil.copytree(photo_project_folder, copy)
    if state != "closed cleanly":
        photo_project_folder, store_dir = copy, copy / ".kinfold"
        assert (store_dir / f"{STORE_FILE}-wal").stat().st_size > 0
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    try:
        _make_read_only([*store_dir.iterdir(), store_dir])
        status = _cli_ro(prefix, "status", photo_project_folder, "--json")
        assert status.returncode == 0, status.stderr
        assert json.loads(status.stdout)["labelled"] == len(g.members)
        export = _cli_ro(prefix, "export", photo_project_folder, "--csv", out_dir / "labels.csv")
        assert export.returncode == 0, export.stderr
        assert (out_dir / "labels.csv").read_text().count("\n") == len(g.members) + 1
        # Proposing only reads while the open groups cover every photo: the same groups, the same ids.
        shown = _cli_ro(prefix, "propose", photo_project_folder, "--json")
        assert shown.returncode == 0, shown.stderr
        assert [x["id"] for x in json.loads(shown.stdout)] == open_ids
        for verb in (["accept", str(open_ids[0]), "dog"], ["undo"], ["set-aside", g.members[0]], ["scan"]):
            out = _cli_ro(prefix, verb[0], photo_project_folder, *verb[1:])
            assert out.returncode == 1, (verb, out.stdout, out.stderr)
            assert "read-only" in out.stderr and len(out.stderr.strip().splitlines()) == 1, out.stderr
    finally:
        for p in [store_dir, *store_dir.iterdir()]:
            p.chmod(p.stat().st_mode | stat.S_IWUSR)
    # Nothing was changed by the refused verbs.
    with Project.open(photo_project_folder) as p:
        assert p.status().labelled == len(g.members) and p.status().actions == 1


def test_read_only_store_with_unsaved_wal_but_no_shm_is_refused_with_a_reason(photo_project_folder, tmp_path):
    prefix = _without_write_access()
    with Project.open(photo_project_folder) as p:
        p.accept(p.propose(limit=1)[0].id, "cat")
        copy = tmp_path / "copy"
        shutil.copytree(photo_project_folder, copy)
    store_dir = copy / ".kinfold"
    (store_dir / f"{STORE_FILE}-shm").unlink()
    try:
        _make_read_only([*store_dir.iterdir(), store_dir])
        out = _cli_ro(prefix, "status", copy)
        assert out.returncode == 1 and "-wal" in out.stderr and "writable" in out.stderr, out.stderr
        assert len(out.stderr.strip().splitlines()) == 1
    finally:
        for p in [store_dir, *store_dir.iterdir()]:
            p.chmod(p.stat().st_mode | stat.S_IWUSR)


# -- 19. threads -------------------------------------------------------------------------------
def test_store_reads_wait_for_another_threads_transaction(tmp_path):
    # One connection is shared: a read outside the lock would see another thread's uncommitted write.
    st = Store(tmp_path / "s")
    inside, seen = threading.Event(), []

    def writer():
        try:
            with st.transaction() as db:
                db.execute("INSERT INTO settings VALUES ('x', '1')")
                inside.set()
                threading.Event().wait(0.3)
                raise RuntimeError("rolled back")
        except RuntimeError:
            pass

    t = threading.Thread(target=writer)
    t.start()
    inside.wait(5)
    seen.append(st.get_setting("x"))
    seen.append(st.schema_version())
    t.join()
    assert seen == [None, SCHEMA_VERSION]
    st.close()


def test_threads_hammering_one_project(photo_project_folder):
    errors, returned = [], []
    with Project.open(photo_project_folder) as p:
        paths = p.photos()

        def work(seed):
            rng = np.random.default_rng(seed)
            for _ in range(40):
                try:
                    groups = p.propose(limit=3)
                    p.status()
                    act = rng.integers(6)
                    if groups and act == 0:
                        returned.append(p.accept(groups[0].id, f"label {rng.integers(3)}"))
                    elif groups and act == 1:
                        returned.append(p.defer(groups[-1].id))
                    elif act == 2:
                        returned.append(p.label([paths[rng.integers(len(paths))]], "single"))
                    elif act == 3:
                        p.undo()
                    elif act == 4:
                        p.labelled_photos()
                        p.neighbours(paths[rng.integers(len(paths))])
                    else:
                        returned.append(p.clear([paths[rng.integers(len(paths))]]))
                except ProjectError as exc:
                    # Another thread decided the group first: a reason, not a fault.
                    if "no longer open" not in str(exc):
                        errors.append(repr(exc))
                except Exception as exc:
                    errors.append(repr(exc))

        threads = [threading.Thread(target=work, args=(i,)) for i in range(4)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(120)
        assert not any(t.is_alive() for t in threads)
        assert errors == []
        logged = {d["id"] for d in p.store.decisions()}
        assert set(returned) <= logged                   # every call that returned is in the store
        s = p.status()
        assert s.labelled + s.set_aside + s.unlabelled == s.photos == len(paths)
        groups = p.propose(limit=20)
        members = [m for g in groups for m in g.members]
        assert len(members) == len(set(members))
        assert p.store._one("PRAGMA integrity_check")[0] == "ok"
