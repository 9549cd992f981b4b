"""Kill Kinfold with SIGKILL at random moments in every verb, then check that nothing was lost.

    python -m benchmarks.fault_kill --kills 100 --seed 0        # the full run, + 10 CLI kills (~5-8 min, 2 cores)
    python -m benchmarks.fault_kill --kills 12 --seed 0         # every verb at least once (~2 min)
    python -m benchmarks.fault_kill --sweep                     # each verb and command killed before each step (~7 min)
    python -m benchmarks.fault_kill --sweep --verbs export      # one verb only
    python -m benchmarks.fault_kill --kills 0 --cli-kills 20    # the command line only

One project (a copy of the demo folder, sample_images/) is kept going across all kills, so damage
accumulates the way it would for a person whose machine keeps crashing. Each round:

1. A driver process (this module with --driver, calling `core.project.Project` directly) opens the
   project, makes 0-2 ordinary decisions (label or accept) that return normally, prepares one call
   of the round's verb (scan, label, accept, split, undo, later, relearn, export), prints BEGIN on
   its stdout and makes the call. After every call returns it appends a line to a log file and
   fsyncs it, so the log lists exactly the calls that returned before the kill.
2. The kill, by turns for each verb:
   - "clock": this process reads BEGIN, waits a random fraction (seeded) of the verb's last measured
     duration and sends SIGKILL;
   - "step": the driver SIGKILLs itself just before a random one of the call's steps (a store
     statement or a file created, replaced or removed), so the short windows between two
     transactions or two renames are hit as often as any other moment;
   - "file" (scans): the driver SIGKILLs itself once a random share of the files has been read and
     hashed (the scan's first stage takes about 2% of its time, so a clock rarely lands in it).
   After the --kills rounds come --cli-kills rounds (default 10) of the command line as a user runs
   it: `kinfold accept FOLDER GROUP LABEL [--drop ...]` and `kinfold export FOLDER --csv --coco
   --folders` (no --overwrite: what earlier kills left must be recognised as Kinfold's) by turns, killed by the clock (`python -m app.cli ...`, a random share of
   its last run, start-up included) or before a random step of the whole process (the same command
   run through `runpy` with the steps counted); exit status 0 counts as returned.
   Before each scan, new photos are added (they must be embedded), two earlier ones are changed,
   one removed, and every original gets a new modification time (so it is read and hashed again).
3. Checks, on the store as the kill left it (plain sqlite3, not Kinfold's code):
   - every call logged as returned is in the store (decision row with its label and photos, label
     rows unless a later decision changed them, undo rows, split parts, photos left for later,
     relearned versions, the scanned catalogue); a call killed mid-way is either wholly there or
     wholly absent (a "half decision" otherwise);
   - `PRAGMA integrity_check` is ok;
   - the previous export (CSV, COCO, class folders) is byte-identical, or replaced by a complete
     newer one (equal to what exporting the same store again gives), never missing; a kill between
     two formats leaves one new and one old file, each whole: counted apart ("mixing two exports"),
     since separate destinations cannot be replaced in one step (README, "Exports follow these rules");
   then the next run: open, scan, propose and export (without overwrite=True) to the same
   destinations must work, and
   afterwards no temporary file may be left in the store folder or beside the export destinations.

The kill lands inside the call, or during close/exit when the call was faster than its last measured
duration (or had fewer steps); the table says how many of each. The verbs, choices, delay fractions
and steps are drawn from the seed, so a rerun makes the same plan; where a clock kill lands depends
on the machine's load, so the exact outcome can differ between runs.
"""
from __future__ import annotations

import argparse
import hashlib
import json
import os
import random
import re
import select
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time
from collections import Counter, defaultdict
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

VERBS = ("scan", "label", "accept", "split", "undo", "later", "relearn", "export")
CLI_VERBS = ("accept", "export")      # also killed as `python -m app.cli VERB ...` subprocesses
DECISION_VERBS = ("label", "accept", "split", "undo", "later", "clear")
LABELS = ("hex nut", "washer", "coil spring", "spur gear", "fuse", "key blank")
EXPORTS = {"csv": "labels.csv", "coco": "labels.coco.json", "folders": "classes"}
# What Kinfold keeps in its store folder for good (core/store.py, core/project.py): the store with its
# WAL files, the folder lock, one neighbour-graph cache graph-<16 hex>.npz, and the embeddings files
# vectors-<token>.f32 the store names (a file it does not name is a compaction's leftover).
STORE_FILES = {"kinfold.sqlite", "kinfold.sqlite-wal", "kinfold.sqlite-shm", "lock"}
_GRAPH_CACHE = re.compile(r"graph-[0-9a-f]{16}\.npz")
# Kinfold's temporaries, by what made them; anything else found is listed as "unknown".
_TEMPORARY_KINDS = (
    (re.compile(r"\.kinfold\.sqlite\.new-\d+-[0-9a-f]+(-wal|-shm)?$"), "a new store being made"),
    (re.compile(r"graph-\d+-\d+\.tmp\.npz$"), "a graph cache being written"),
    (re.compile(r"^vectors-[0-9a-f]+\.f32$"), "an embeddings file no table names (a compaction's)"),
    (re.compile(r"^\..*\.kinfold-(tmp|old|oldcut)-[0-9a-f]{8}-\d+-[0-9a-z]{8}$"), "an export's temporary"),
)


def temporary_kind(name: str) -> str:
    return next((what for rx, what in _TEMPORARY_KINDS if rx.search(name)), "unknown")


# ------------------------------------------------------------------ export digests (shared)

def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _normal_coco(data: bytes) -> bytes:
    doc = json.loads(data)
    for key in ("date_created", "year"):
        doc.get("info", {}).pop(key, None)
    return json.dumps(doc, sort_keys=True).encode()


def _normal_marker(data: bytes) -> bytes:
    doc = json.loads(data)
    doc.pop("created", None)
    return json.dumps(doc, sort_keys=True).encode()


def tree_listing(root: Path, normal: bool = False) -> list[tuple]:
    """Every entry under root: (relative path, kind, link target or content hash)."""
    out = []
    for dirpath, dirnames, filenames in os.walk(root):
        here = Path(dirpath)
        for name in sorted(dirnames + filenames):
            p = here / name
            rel = p.relative_to(root).as_posix()
            if p.is_symlink():
                out.append((rel, "link", os.readlink(p)))
            elif p.is_dir():
                out.append((rel, "dir", ""))
            else:
                data = p.read_bytes()
                if normal and name == ".kinfold-export.json":
                    data = _normal_marker(data)
                out.append((rel, "file", _sha(data)))
    return sorted(out)


def export_digest(path: Path, kind: str, normal: bool = False) -> str | None:
    """A digest of one export destination (None when it is missing or unreadable). `normal` leaves
    out the creation time, so two exports of the same store compare equal."""
    try:
        if kind == "folders":
            if not path.is_dir():
                return None
            return _sha(json.dumps(tree_listing(path, normal)).encode())
        data = path.read_bytes()
        if normal and kind == "coco":
            data = _normal_coco(data)
        return _sha(data)
    except (OSError, ValueError):
        return None


def run_export(p, dests: dict[str, Path], overwrite: bool = True) -> dict:
    """CSV, COCO and class folders in one call, as `kinfold export --csv --coco --folders [--overwrite]`
    does: all or nothing across the formats."""
    r = p.export(csv=str(dests["csv"]), coco=str(dests["coco"]), folders=str(dests["folders"]), overwrite=overwrite)
    return {k: v if isinstance(v, (int, dict)) else str(v) for k, v in r.items()}


# ------------------------------------------------------------------ the driver (killed process)

class _Log:
    def __init__(self, path: str, rnd: int):
        self.f = open(path, "a", encoding="utf-8")
        self.rnd = rnd

    def note(self, event: str, **kw) -> None:
        self.f.write(json.dumps(dict(round=self.rnd, event=event, t=time.time(), **kw)) + "\n")
        self.f.flush()
        os.fsync(self.f.fileno())


def _max_ids(p) -> tuple[int, int]:
    """The newest decision and proposal ids (rows are never deleted: larger ids are newer)."""
    db = sqlite3.connect(f"file:{p.store.path}?mode=ro", uri=True)
    try:
        return tuple(db.execute(f"SELECT COALESCE(MAX(id), 0) FROM {t}").fetchone()[0]
                     for t in ("decisions", "proposals"))
    finally:
        db.close()


def _state_of(p, fps) -> dict:
    """Each photo's label row (state, label) or None, whether it is left for later, and the open
    groups, read with plain SQL at the moment the targeted call begins."""
    db = sqlite3.connect(f"file:{p.store.path}?mode=ro", uri=True)
    try:
        labels = {r[0]: [r[1], r[2]] for r in db.execute("SELECT fingerprint, state, label FROM labels")}
        deferred = {r[0] for r in db.execute("SELECT fingerprint FROM deferred")}
        open_groups = sorted(r[0] for r in db.execute("SELECT id FROM proposals WHERE open=1"))
    finally:
        db.close()
    return dict(labels={fp: labels.get(fp) for fp in fps}, deferred=sorted(set(fps) & deferred),
                open_groups=open_groups)


def _paths_of_label(p, label: str) -> list[str]:
    return [x.path for x in p.labelled_photos() if x.label == label]


def _fp(p, path: str) -> str:
    return p.photo_info(path)["fingerprint"]


def _pick_group(p, rng, *, splittable=False, limit=12):
    groups = [g for g in p.propose(limit=limit) if not splittable or g.splittable]
    return rng.choice(groups) if groups else None


def _background(p, rng, log, kind: str) -> None:
    """An ordinary decision that returns before the targeted call (logged like every returned call)."""
    if kind == "accept":
        g = _pick_group(p, rng)
        if g is not None:
            drop = rng.sample(g.members[1:], min(len(g.members) - 1, rng.randint(0, 2)))
            label = g.suggested_label or rng.choice(LABELS)
            dec = p.accept(g.id, label, drop=drop)
            log.note("returned", verb="accept", background=True, decision=dec, label=label, group=g.id,
                     members=g.members, drop=drop)
            return
    paths = rng.sample(p.photos(), rng.randint(1, 4))
    label = rng.choice(LABELS)
    dec = p.label(paths, label)
    log.note("returned", verb="label", background=True, decision=dec, label=label, paths=paths)


def _free_up(p, rng, log) -> None:
    """Keep photos in the pool: when most are labelled, clear one label's photos (a logged decision)."""
    st = p.status()
    if st.photos and st.unlabelled < 0.35 * st.photos and st.by_label:
        paths = _paths_of_label(p, max(st.by_label, key=st.by_label.get))
        dec = p.clear(paths)
        log.note("returned", verb="clear", background=True, decision=dec, paths=paths)


def _scan_progress(log, kill_at_file: float | None = None):
    """Notes the stages of a scan in the log; with `kill_at_file` (a fraction) SIGKILLs the process
    once that share of the files has been read and hashed."""
    last = [None]

    def progress(done, total, message):
        stage = "reading files" if message == "reading files" else "embedding"
        if kill_at_file is not None and stage == "reading files" and done >= max(1, round(kill_at_file * total)):
            os.kill(os.getpid(), signal.SIGKILL)
        # The first progress of each stage, and the end of reading (hashing) files.
        if stage != last[0] or (stage == "reading files" and done == total):
            last[0] = stage
            log.note("phase", stage=stage, done=done, total=total)
    return progress


class _Steps:
    """Counts the call's steps and, with `kill_at`, SIGKILLs the process just before one of them.

    A step is a store statement of a new kind (BEGIN, COMMIT, ROLLBACK, or a statement not yet seen
    since the last of those: the rows of a loop count once) or a file created, replaced or removed.
    Killing before a chosen step hits the short windows between two transactions, or between two
    renames, as often as any other moment, which a clock rarely manages."""

    FILE_OPS = ((os, "replace"), (os, "rename"), (os, "link"), (os, "unlink"), (os, "remove"), (os, "rmdir"),
                (os, "mkdir"), (shutil, "rmtree"), (tempfile, "mkstemp"), (tempfile, "mkdtemp"))
    _LITERALS = re.compile(r"X'[0-9A-Fa-f]*'|'(?:[^']|'')*'|\b\d+(?:\.\d+)?\b")

    def __init__(self):
        self.armed = False
        self.n = 0
        self.kill_at: int | None = None
        self._seen: set[str] = set()
        self.inside = False
        self.names: list[str] = []       # what each step was, for the report

    def step(self, name: str) -> None:
        if not self.armed:
            return
        if self.kill_at is not None and self.n >= self.kill_at:
            os.kill(os.getpid(), signal.SIGKILL)
        self.n += 1
        self.names.append(name)

    def _sql(self, statement: str) -> None:
        shape = self._LITERALS.sub("?", statement.strip())
        word = shape.split(None, 1)[0].upper() if shape else ""
        if word in ("BEGIN", "COMMIT", "ROLLBACK", "END"):
            self._seen.clear()
            self.step(word)
        elif shape not in self._seen:
            self._seen.add(shape)
            self.step(" ".join(shape.split()[:4])[:48])

    def install(self) -> None:
        real_connect = sqlite3.connect

        def connect(*args, **kwargs):
            db = real_connect(*args, **kwargs)
            db.set_trace_callback(self._sql)
            return db
        sqlite3.connect = connect
        from core import export as export_mod   # its one-step swap of two folders is a file operation too

        for module, name in self.FILE_OPS + ((export_mod, "_exchange"),):
            real = getattr(module, name, None)
            if real is None:   # an older Kinfold without it
                continue

            def wrapped(*args, _real=real, _name=f"{module.__name__}.{name}", **kwargs):
                if self.inside:   # rmtree's own unlinks are part of one step
                    return _real(*args, **kwargs)
                self._seen.clear()
                self.step(_name)
                self.inside = True
                try:
                    return _real(*args, **kwargs)
                finally:
                    self.inside = False
            setattr(module, name, wrapped)
        real_open = os.open

        def os_open(path, flags, *args, **kwargs):   # a file created (an export's temporary)
            if flags & os.O_CREAT and not self.inside:
                self._seen.clear()
                self.step("os.open(O_CREAT)")
            return real_open(path, flags, *args, **kwargs)
        os.open = os_open


def driver(spec: dict) -> None:
    rng = random.Random(spec["seed"])
    verb, log = spec["verb"], _Log(spec["log"], spec["round"])
    steps = _Steps()
    steps.install()   # before Project.open, so the store's connection is traced
    from core import project as project_mod
    from core.project import Project

    if verb in ("scan", "relearn"):
        import torch  # noqa: F401  (imported before BEGIN so the kill lands in the call itself)
        from core import relearning  # noqa: F401
    p = Project.open(spec["folder"], annotator="fault-kill")
    if verb == "scan":
        p.extractor()
    else:
        _free_up(p, rng, log)
        n_bg = rng.randint(1 if verb in ("undo", "relearn") else 0, 2)
        for _ in range(n_bg):
            _background(p, rng, log, rng.choice(("label", "accept")))
        if verb == "relearn" and len(p.status().by_label) < 2:
            _background(p, rng, log, "label")
    info: dict = {}
    if verb == "scan":
        call = lambda: p.scan(progress=_scan_progress(log, spec.get("kill_at_file")))  # noqa: E731
    elif verb == "label":
        paths = rng.sample(p.photos(), rng.randint(1, 6))
        label = rng.choice(LABELS)
        info = dict(paths=paths, label=label, fps=[_fp(p, x) for x in paths])
        call = lambda: p.label(paths, label)  # noqa: E731
    elif verb in ("accept", "later", "split"):
        g = _pick_group(p, rng, splittable=verb == "split", limit=20 if verb == "split" else 12)
        if g is None and verb == "split":
            # No group of at least MIN_SPLIT photos open: free a label's photos and ask again.
            st = p.status()
            if st.by_label:
                paths = _paths_of_label(p, max(st.by_label, key=st.by_label.get))
                dec = p.clear(paths)
                log.note("returned", verb="clear", background=True, decision=dec, paths=paths)
            g = _pick_group(p, rng, splittable=True, limit=40)
        if g is None:
            log.note("skipped", verb=verb, reason="no suitable group")
            print("SKIPPED", flush=True)
            time.sleep(3600)
        info = dict(group=g.id, members=g.members, fps=[_fp(p, m) for m in g.members])
        if verb == "accept":
            drop = rng.sample(g.members[1:], min(len(g.members) - 1, rng.randint(0, 2)))
            label = g.suggested_label or rng.choice(LABELS)
            info.update(drop=drop, label=label)
            call = lambda: p.accept(g.id, label, drop=drop)  # noqa: E731
        elif verb == "later":
            call = lambda: p.defer(g.id)  # noqa: E731
        else:
            call = lambda: p.split(g.id)  # noqa: E731
    elif verb == "undo":
        target = p.store.last_undoable_of(getattr(project_mod, "_UNDOABLE", ()))
        info = dict(target=None if target is None else dict(id=target[0], kind=target[1], before=target[2],
                                                             group=target[3]))
        call = p.undo
    elif verb == "relearn":
        call = p.relearn
    elif verb == "export":
        dests = {k: Path(v) for k, v in spec["dests"].items()}
        call = lambda: run_export(p, dests)  # noqa: E731
    else:
        raise SystemExit(f"unknown verb {verb}")
    max_dec, max_prop = _max_ids(p)
    fps = info.get("fps") or list((info.get("target") or {}).get("before") or {})
    info["at_begin"] = _state_of(p, fps)
    log.note("begin", verb=verb, max_decision=max_dec, max_proposal=max_prop, **info)
    print("BEGIN", flush=True)
    steps.kill_at = spec.get("kill_at_step")
    t0 = time.perf_counter()
    steps.armed = True
    try:
        result = call()
    except Exception as exc:  # a refusal is recorded, not fatal: the round still gets its kill
        steps.armed = False
        log.note("error", verb=verb, message=f"{type(exc).__name__}: {exc}")
        print("ERROR", flush=True)
        time.sleep(3600)
    steps.armed = False
    seconds = time.perf_counter() - t0
    extra: dict = {}
    if verb in ("label", "accept", "later"):
        extra = dict(decision=result)
    elif verb == "split":
        extra = dict(parts=[dict(id=g.id, members=g.members) for g in result])
    elif verb == "undo":
        extra = dict(undone=result)
    elif verb == "relearn":
        extra = dict(version=result.get("version"))
    elif verb == "scan":
        photos = sorted(p.photos())
        extra = dict(photos=len(photos), embedded=result.embedded, cancelled=result.cancelled,
                     paths_sha=_sha("\n".join(photos).encode()))
    elif verb == "export":
        extra = dict(digests={k: export_digest(d, k) for k, d in dests.items()})
    extra["max_decision_after"] = _max_ids(p)[0]
    log.note("returned", verb=verb, seconds=seconds, steps=steps.n, step_names=steps.names, **info, **extra)
    p.close()
    log.note("closed", verb=verb)
    print("DONE", flush=True)
    if not spec.get("exit"):
        time.sleep(3600)  # wait for the kill: the process is killed after the call too


def cli_driver(spec: dict) -> int:
    """`python -m app.cli ARGS` as it runs for a user, with its steps counted from the start of the
    process (store statements and file operations, as in the driver) and, with `kill_at_step`,
    a SIGKILL just before one of them. The count goes to `steps_file` when the command ends."""
    import runpy

    steps = _Steps()
    steps.install()
    steps.kill_at = spec.get("kill_at_step")
    steps.armed = True
    sys.argv = [str(ROOT / "core" / "cli.py"), *spec["argv"]]
    code = 0
    try:
        runpy.run_module("app.cli", run_name="__main__", alter_sys=True)
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else 1
    finally:
        steps.armed = False
        with open(spec["steps_file"], "w", encoding="utf-8") as f:
            json.dump(dict(steps=steps.n, names=steps.names), f)
    return code


# ------------------------------------------------------------------ the checker (this process)

@dataclass
class Figures:
    kills: Counter = field(default_factory=Counter)               # per verb
    modes: Counter = field(default_factory=Counter)               # (verb, "clock" or "step")
    in_call: Counter = field(default_factory=Counter)             # killed before the call returned
    after_return: Counter = field(default_factory=Counter)        # killed during close / exit
    raised: Counter = field(default_factory=Counter)              # the call refused (message listed)
    scan_phase: Counter = field(default_factory=Counter)          # where killed scans were
    returned_decisions: set = field(default_factory=set)          # (round, index) of returned decisions
    lost: dict = field(default_factory=dict)                      # (round, index) -> what is missing
    other_returned: Counter = field(default_factory=Counter)      # scan / relearn / export calls returned
    other_lost: list = field(default_factory=list)
    integrity_failures: list = field(default_factory=list)
    half: list = field(default_factory=list)
    partial_exports: list = field(default_factory=list)
    mixed_exports: int = 0
    new_exports: int = 0
    temporaries_after_kill: list = field(default_factory=list)
    leftover_temporaries: dict = field(default_factory=dict)      # path -> first round seen after a rerun
    next_run_failures: list = field(default_factory=list)
    notes: list = field(default_factory=list)
    durations: dict = field(default_factory=lambda: defaultdict(list))

    @property
    def found(self) -> int:
        return len(self.returned_decisions) - len(self.lost)


def _share_extractor() -> None:
    """In this process only: load the network once, not at every next-run scan."""
    from core import embedding

    if getattr(embedding.get_extractor, "shared", False):
        return
    real, loaded = embedding.get_extractor, {}

    def get_extractor(*args, **kwargs):
        key = (args, tuple(sorted(kwargs.items())))
        if key not in loaded:
            loaded[key] = real(*args, **kwargs)
        return loaded[key]
    get_extractor.shared = True
    embedding.get_extractor = get_extractor


class Checker:
    def __init__(self, work: Path, seed: int, added: int, verbose: bool = True):
        self.work = work
        self.folder = work / "photos"
        self.store_dir = self.folder / ".kinfold"
        self.export_dir = work / "exports"
        self.scratch = work / "scratch"
        self.dests = {k: self.export_dir / v for k, v in EXPORTS.items()}
        self.log_path = work / "calls.jsonl"
        self.stderr_path = work / "driver-stderr.txt"
        self.rng = random.Random(seed)
        self.seed = seed
        self.added = added
        self.verbose = verbose
        self.fig = Figures()
        # Seconds and steps of each verb's last returned call (rough guesses until one returned).
        self.estimate: dict[str, float] = dict.fromkeys(VERBS, 0.002) | dict(scan=4.0, relearn=2.0, export=0.1,
                                                                            split=0.02)
        self.steps: dict[str, int] = dict.fromkeys(VERBS, 10) | dict(scan=21, export=18)
        self.estimate |= {"cli accept": 2.0, "cli export": 2.5}
        self.steps |= {"cli accept": 25, "cli export": 27}
        self.step_names: dict[str, list[str]] = {}
        self.prev_export: dict[str, str | None] = {}
        self.returned: list[dict] = []     # every returned call so far (rechecked after every kill)
        _share_extractor()

    # -- the store, read without Kinfold --------------------------------------------------------
    def _db(self):
        return sqlite3.connect(f"file:{self.store_dir / 'kinfold.sqlite'}?mode=ro", uri=True)

    def _snapshot(self) -> dict:
        db = self._db()
        try:
            dec = {r[0]: dict(kind=r[1], label=r[2], group=r[3], photos=json.loads(r[4]), before=json.loads(r[5]),
                              undoes=r[6])
                   for r in db.execute("SELECT id, kind, label, group_id, photos, before, undoes FROM decisions")}
            labels = {r[0]: (r[1], r[2]) for r in db.execute("SELECT fingerprint, state, label FROM labels")}
            props = {r[0]: dict(members=json.loads(r[1]), kind=r[2], open=bool(r[3]), pinned=bool(r[4]))
                     for r in db.execute("SELECT id, members, kind, open, pinned FROM proposals")}
            deferred = {r[0] for r in db.execute("SELECT fingerprint FROM deferred")}
            versions = {r[0] for r in db.execute("SELECT id FROM relearn_versions")}
            rejections = {(r[0], r[1], r[2]) for r in db.execute("SELECT fingerprint, label, decision FROM rejections")}
            ext = db.execute("SELECT value FROM settings WHERE key='extractor_id'").fetchone()
            ext = json.loads(ext[0]) if ext else None
            embedded = {r[0] for r in db.execute("SELECT fingerprint FROM vector_rows WHERE extractor=?", (ext,))}
            photos = sorted(r[0] for r in db.execute("SELECT path, fingerprint FROM photos") if r[1] in embedded)
            path_fp = dict(db.execute("SELECT path, fingerprint FROM photos").fetchall())
        finally:
            db.close()
        touched = defaultdict(list)            # fingerprint -> ids of decisions that changed it
        for i, d in sorted(dec.items()):
            for fp in d["before"]:
                touched[fp].append(i)
        return dict(dec=dec, labels=labels, props=props, deferred=deferred, versions=versions,
                    rejections=rejections, photos=photos, path_fp=path_fp, touched=touched)

    def integrity(self) -> str:
        db = sqlite3.connect(self.store_dir / "kinfold.sqlite")
        try:
            return "; ".join(r[0] for r in db.execute("PRAGMA integrity_check"))
        except sqlite3.Error as exc:
            return f"{type(exc).__name__}: {exc}"
        finally:
            db.close()

    @staticmethod
    def _changed_after(s: dict, fp: str, after: int) -> bool:
        return any(i > after for i in s["touched"].get(fp, ()))

    # -- is a returned call in the store? --------------------------------------------------------
    def missing(self, e: dict, s: dict) -> str | None:
        """What of a returned call is not in the store (None: all of it is)."""
        verb, dec = e["verb"], s["dec"]
        after = e.get("max_decision_after", e.get("decision") or 0)
        if verb in ("label", "accept", "clear"):
            d = dec.get(e["decision"])
            if d is None or d["kind"] != verb:
                return f"{verb} decision {e['decision']} is not in the log"
            if verb != "clear" and d["label"] != e["label"]:
                return f"{verb} decision {e['decision']} has label {d['label']!r}, not {e['label']!r}"
            allowed = set(e.get("paths") or (set(e["members"]) - set(e.get("drop", ()))))
            if not set(d["photos"]) <= allowed:
                return f"{verb} decision {e['decision']} lists photos that were not asked for"
            want = None if verb == "clear" else ("labelled", e["label"])
            for fp in d["before"]:
                if not self._changed_after(s, fp, e["decision"]) and s["labels"].get(fp) != want:
                    return f"{verb} decision {e['decision']}: photo {fp[:8]} is {s['labels'].get(fp)}, not {want}"
            if verb == "accept" and not any(i > e["decision"] for i in dec):
                if s["props"].get(e["group"], {}).get("open"):
                    return f"accepted group {e['group']} is still open"
            return None
        if verb == "split":
            if not any(d["kind"] == "split" and d["group"] == e["group"] for d in dec.values()):
                return f"split of group {e['group']} is not in the log"
            for part in e["parts"]:
                row = s["props"].get(part["id"])
                if row is None or row["members"] != part["members"]:
                    return f"split part {part['id']} of group {e['group']} is missing or changed"
            return None
        if verb == "undo":
            if e["undone"] is None:
                return None
            target = e["undone"]["decision"]
            undo = [i for i, d in dec.items() if d["kind"] == "undo" and d["undoes"] == target]
            if not undo:
                return f"undo of decision {target} is not in the log"
            before = (e.get("target") or {}).get("before") or {}
            for fp, prev in before.items():
                want = None if prev is None else (prev[0], prev[1])
                if not self._changed_after(s, fp, undo[0]) and s["labels"].get(fp) != want:
                    return f"undo of decision {target}: photo {fp[:8]} is {s['labels'].get(fp)}, not {want}"
            return None
        if verb == "later":
            d = dec.get(e["decision"])
            if d is None or d["kind"] != "later" or d["group"] != e["group"]:
                return f"later decision {e['decision']} on group {e['group']} is not in the log"
            if any(x["kind"] == "undo" and x["undoes"] == e["decision"] for x in dec.values()):
                return None   # undone: the photos are back in the pool
            if set(d["before"]) != set(e["fps"]):
                return f"later decision {e['decision']} does not list the group's photos for undo"
            kept = [fp for fp in e["fps"] if fp not in s["deferred"] and not self._changed_after(s, fp, after)]
            if kept:
                return f"later of group {e['group']}: {len(kept)} of {len(e['fps'])} photos are not left for later"
            if s["props"].get(e["group"], {}).get("open"):
                return f"group {e['group']} left for later is still open"
            return None
        if verb == "relearn":
            if e["version"] is not None and e["version"] not in s["versions"]:
                return f"relearned version {e['version']} is not in the store"
            return None
        return None

    # -- a killed call: all or nothing? ---------------------------------------------------------
    def half_done(self, b: dict, s: dict) -> str | None:
        """A killed call is all or nothing: either its decision is logged with every effect, or
        nothing of it is in the store (labels, photos left for later, groups as at its start)."""
        verb, dec, props = b["verb"], s["dec"], s["props"]
        new = {i: d for i, d in dec.items() if i > b["max_decision"]}
        at = b["at_begin"]
        was_open = set(at["open_groups"])

        def is_open(gid) -> bool:
            return bool(props.get(gid, {}).get("open"))

        def labels_as(want: dict) -> list[str]:
            """Photos whose label row is not `want` ({fp: [state, label] or None})."""
            return [fp[:8] for fp, w in want.items()
                    if (None if w is None else tuple(w[:2])) != s["labels"].get(fp)]

        def deferred_as(fps, want: set) -> list[str]:
            return [fp[:8] for fp in fps if (fp in s["deferred"]) != (fp in want)]

        def untouched() -> str | None:
            """The call is not logged: nothing of it may be in the store."""
            wrong = labels_as(at["labels"])
            wrong_d = deferred_as(at["labels"], set(at["deferred"]))
            reopened = [g for g in at["open_groups"] if not is_open(g)]
            if wrong or wrong_d or reopened:
                return (f"{verb} not logged, yet labels changed for {wrong}, photos left for later changed for "
                        f"{wrong_d}, groups closed {reopened[:5]}")
            return None

        if verb == "label":
            logged = [d for d in new.values() if d["kind"] == "label" and d["label"] == b["label"]]
            if not logged:
                why = untouched()
                return why and f"label half done: {why}"
            wrong = labels_as({fp: ["labelled", b["label"]] for fp in b["fps"]})
            return f"label logged but photos {wrong} do not carry {b['label']!r}" if wrong else None
        if verb == "accept":
            logged = [i for i, d in new.items() if d["kind"] == "accept" and d["group"] == b["group"]]
            if not logged:
                why = untouched()
                return why and f"accept of group {b['group']} half done: {why}"
            members = dict(zip(b["members"], b["fps"]))
            want = {fp: ["labelled", b["label"]] for m, fp in members.items()
                    if m not in b["drop"] and at["labels"].get(fp) is None}
            wrong = labels_as(want)
            unrejected = [fp[:8] for m, fp in members.items()
                          if m in b["drop"] and (fp, b["label"], logged[0]) not in s["rejections"]]
            if wrong or unrejected or is_open(b["group"]):
                return (f"accept of group {b['group']} half done: logged, yet photos {wrong} are not labelled, "
                        f"{unrejected} taken out are not recorded, the group open={is_open(b['group'])}")
            return None
        if verb == "split":
            logged = any(d["kind"] == "split" and d["group"] == b["group"] for d in new.values())
            parts = [i for i, r in props.items() if i > b["max_proposal"] and r["kind"] == "split part" and r["open"]]
            closed = not is_open(b["group"])
            if logged == bool(parts) == closed:
                return None
            return (f"split of group {b['group']} half done: decision logged={logged}, parts stored={bool(parts)}, "
                    f"group closed={closed}")
        if verb == "later":
            logged = [d for d in new.values() if d["kind"] == "later" and d["group"] == b["group"]]
            if not logged:
                why = untouched()
                return why and f"later of group {b['group']} half done: {why}"
            wrong = deferred_as(b["fps"], set(b["fps"]))
            if wrong or is_open(b["group"]):
                return (f"later of group {b['group']} half done: logged, yet photos {wrong} are not left for "
                        f"later and the group open={is_open(b['group'])}")
            return None
        if verb == "undo" and b.get("target"):
            t = b["target"]
            logged = any(d["kind"] == "undo" and d["undoes"] == t["id"] for d in new.values())
            if not logged:
                why = untouched()
                if why is None and t["group"] is not None and t["kind"] in ("accept", "split", "later") \
                        and is_open(t["group"]) and t["group"] not in was_open:
                    why = f"group {t['group']} reopened"
                return why and f"undo of {t['kind']} {t['id']} half done: {why}"
            if t["kind"] == "later":
                wrong = deferred_as(t["before"], {fp for fp, prev in t["before"].items() if prev is not None})
            else:
                wrong = labels_as(t["before"])
            reopened = t["group"] is None or t["kind"] not in ("accept", "split", "later") or is_open(t["group"])
            if wrong or not reopened:
                return (f"undo of {t['kind']} {t['id']} half done: logged, yet photos {wrong} are not as before "
                        f"and group {t['group']} reopened={reopened}")
            return None
        return None

    # -- exports -------------------------------------------------------------------------------------
    def _scratch_export(self) -> dict[str, str | None]:
        from core.project import Project

        shutil.rmtree(self.scratch, ignore_errors=True)
        self.scratch.mkdir()
        dests = {k: self.scratch / v for k, v in EXPORTS.items()}
        with Project.open(self.folder, annotator="fault-kill") as p:
            run_export(p, dests)
        out = {k: export_digest(d, k, normal=True) for k, d in dests.items()}
        shutil.rmtree(self.scratch, ignore_errors=True)
        return out

    def check_exports(self, rnd: int, verb: str, returned: dict | None, what: str) -> None:
        now = {k: export_digest(d, k) for k, d in self.dests.items()}
        if returned is not None:
            for k, want in returned["digests"].items():
                if now[k] != want:
                    self.fig.other_lost.append(f"round {rnd}: the returned {k} export was changed after it returned")
            return
        if now == self.prev_export:
            return
        expected = self._scratch_export() if verb == "export" else {}
        newer = 0
        for k, d in self.dests.items():
            if now[k] == self.prev_export.get(k):
                continue
            if verb == "export" and export_digest(d, k, normal=True) == expected.get(k) and now[k] is not None:
                newer += 1
                continue
            state = "missing" if now[k] is None else "changed and incomplete"
            self.fig.partial_exports.append(f"round {rnd} ({verb}, killed {what}): {k} export {d.name} {state}")
        if newer:
            self.fig.new_exports += 1
            if newer < len(self.dests):
                self.fig.mixed_exports += 1

    # -- temporaries -----------------------------------------------------------------------------
    def temporaries(self) -> list[str]:
        out = []
        live = self.vector_files()
        for p in sorted(self.store_dir.iterdir()) if self.store_dir.is_dir() else []:
            name = p.name
            if name not in STORE_FILES and not _GRAPH_CACHE.fullmatch(name) and name not in live:
                out.append(str(p.relative_to(self.work)))
        if self.export_dir.is_dir():
            wanted = set(EXPORTS.values())
            out += [str(p.relative_to(self.work)) for p in sorted(self.export_dir.iterdir()) if p.name not in wanted]
        out += [str(p.relative_to(self.work)) for p in sorted(self.folder.iterdir())
                if p.name.startswith(".") and p.name != ".kinfold"]
        return out

    def vector_files(self) -> set[str]:
        """The embeddings files the store names (core/vectors.py); one it does not name is a leftover."""
        db_path = self.store_dir / "kinfold.sqlite"
        if not db_path.exists():
            return set()
        try:
            db = sqlite3.connect(f"{db_path.resolve().as_uri()}?mode=ro", uri=True)
            try:
                return {f"vectors-{r[0]}.f32" for r in db.execute("SELECT token FROM vector_files")}
            finally:
                db.close()
        except sqlite3.Error:
            return set()

    # -- the next run ------------------------------------------------------------------------------
    def next_run(self, rnd: int) -> None:
        from core.project import Project

        step = "open"
        try:
            with Project.open(self.folder, annotator="fault-kill") as p:
                step = "scan"
                rep = p.scan()
                if rep.cancelled:
                    raise RuntimeError("scan says cancelled")
                step = "propose"
                p.propose(limit=10)
                step = "export"
                # Without overwrite: whatever a kill left must still be recognised as Kinfold's own.
                run_export(p, self.dests, overwrite=False)
        except Exception as exc:
            self.fig.next_run_failures.append(f"round {rnd}: {step}: {type(exc).__name__}: {exc}")
        self.prev_export = {k: export_digest(d, k) for k, d in self.dests.items()}

    # -- photos for the scans ----------------------------------------------------------------------
    def change_folder(self, rnd: int) -> None:
        """Give the next scan work: new photos (embedding), a changed and a removed one, and new
        modification times on every original (each is read and hashed again)."""
        from PIL import Image, ImageOps

        originals = sorted(p for p in self.folder.rglob("*.jpg") if "added" not in p.parts)
        added_dir = self.folder / "added"
        added_dir.mkdir(exist_ok=True)
        earlier = sorted(added_dir.glob("*.jpg"))
        rng = random.Random(f"{self.seed}/photos/{rnd}")

        def variant(src: Path, dest: Path) -> None:
            with Image.open(src) as im:
                im = ImageOps.exif_transpose(im).convert("RGB")
                w, h = im.size
                box = (rng.randint(0, w // 12), rng.randint(0, h // 12), w - rng.randint(0, w // 12),
                       h - rng.randint(0, h // 12))
                out = ImageOps.mirror(im.crop(box))
                tmp = dest.with_name("tmp-" + dest.name)
                out.save(tmp, "JPEG", quality=rng.randint(80, 94))
                os.replace(tmp, dest)   # the scan never sees a half-written photo

        def some_variant(dest: Path) -> None:
            while True:
                try:
                    return variant(rng.choice(originals), dest)
                except OSError:   # the demo's truncated JPEG: take another
                    pass

        for i in range(self.added):
            some_variant(added_dir / f"r{rnd:03d}-{i:02d}.jpg")
        if len(earlier) > 4:
            for p in rng.sample(earlier, 2):
                some_variant(p)
            rng.choice(earlier).unlink()
        now = time.time()
        for p in originals:
            os.utime(p, (now, now))

    # -- the command line --------------------------------------------------------------------------
    def _cli_prepare(self, rnd: int, verb: str) -> tuple[list[str], dict]:
        """The command's arguments and its begin event (what the store held when it was started).
        For `accept` a group is picked here, after ordinary decisions like the driver's."""
        from core.project import Project

        rng = random.Random(f"{self.seed}/cli/{rnd}")
        info: dict = {}
        folder = str(self.folder)
        with Project.open(self.folder, annotator="fault-kill") as p:
            if verb == "accept":
                log = _Log(str(self.log_path), rnd)
                _free_up(p, rng, log)
                g = _pick_group(p, rng)
                if g is None:
                    raise RuntimeError("no group to accept")
                drop = rng.sample(g.members[1:], min(len(g.members) - 1, rng.randint(0, 2)))
                label = g.suggested_label or rng.choice(LABELS)
                info = dict(group=g.id, members=g.members, fps=[_fp(p, m) for m in g.members], drop=drop,
                            label=label)
                argv = ["accept", folder, str(g.id), label, "--annotator", "fault-kill"]
                argv += ["--drop", *drop] if drop else []
            else:
                argv = ["export", folder, "--csv", str(self.dests["csv"]), "--coco", str(self.dests["coco"]),
                        "--folders", str(self.dests["folders"])]
            max_dec, max_prop = _max_ids(p)
            info["at_begin"] = _state_of(p, info.get("fps", []))
        begin = dict(round=rnd, event="begin", verb=verb, max_decision=max_dec, max_proposal=max_prop, **info)
        return argv, begin

    def _cli_spawn(self, argv: list[str], kill_at_step: int | None, counted: bool):
        env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
        err = open(self.stderr_path, "a")
        err.write(f"--- kinfold {' '.join(argv[:1])}\n")
        err.flush()
        if counted:
            spec = dict(argv=argv, kill_at_step=kill_at_step, steps_file=str(self.work / "cli-steps.json"))
            cmd = [sys.executable, "-m", "benchmarks.fault_kill", "--cli-driver", json.dumps(spec)]
        else:
            cmd = [sys.executable, "-m", "app.cli", *argv]     # exactly what a user runs
        return subprocess.Popen(cmd, cwd=ROOT, env=env, stdout=subprocess.DEVNULL, stderr=err)

    def calibrate_cli(self) -> None:
        """Each command once, not killed, its steps counted: the estimates for its kills."""
        for i, verb in enumerate(CLI_VERBS):
            rnd = -100 - i
            argv, begin = self._cli_prepare(rnd, verb)
            self.record_returned(self._events(rnd))      # the ordinary decisions made first
            t0 = time.perf_counter()
            rc = self._cli_spawn(argv, None, True).wait(timeout=600)
            seconds = time.perf_counter() - t0
            counted = json.loads((self.work / "cli-steps.json").read_text())
            name = f"cli {verb}"
            self.estimate[name], self.steps[name], self.step_names[name] = seconds, counted["steps"], counted["names"]
            self.fig.durations[name].append(seconds)
            if rc != 0:
                self.fig.notes.append(f"calibration kinfold {verb} exited {rc} (see {self.stderr_path})")
            else:
                self._cli_returned(rnd, verb, begin)
            self.next_run(rnd)

    def _cli_returned(self, rnd: int, verb: str, begin: dict) -> dict:
        """The command exited 0: what it did, found in the store (counted lost when it is not)."""
        e = dict(begin, event="returned", key=(rnd, "cli"))
        if verb == "accept":
            s = self._snapshot()
            found = [i for i, d in s["dec"].items()
                     if i > begin["max_decision"] and d["kind"] == "accept" and d["group"] == begin["group"]]
            self.fig.returned_decisions.add(e["key"])
            if not found:
                self.fig.lost[e["key"]] = f"round {rnd}: kinfold accept {begin['group']} exited 0, no decision logged"
                return e
            e.update(decision=found[0], max_decision_after=max(s["dec"]))
        else:
            e.update(digests={k: export_digest(d, k) for k, d in self.dests.items()})
            self.fig.other_returned[verb] += 1
        self.returned.append(e)
        return e

    def cli_round(self, rnd: int, verb: str, fraction: float, mode: str) -> None:
        """Kill `kinfold accept` or `kinfold export` (the command line as a subprocess): by the clock
        (`python -m app.cli`, a random share of its last measured run) or before one of its steps."""
        f, name = self.fig, f"cli {verb}"
        started = time.perf_counter()
        before_temps = set(self.temporaries())
        try:
            argv, begin = self._cli_prepare(rnd, verb)
        except RuntimeError as exc:
            f.notes.append(f"round {rnd} {name}: {exc}")
            return
        self.record_returned(self._events(rnd))      # the ordinary decisions made first
        if mode in ("step", "sweep"):
            kill_at = int(fraction if mode == "sweep" else fraction * (self.steps.get(name, 0) + 1))
            names = self.step_names.get(name, [])
            what = f"before step {kill_at}/{self.steps.get(name, 0)}" + (
                f" ({names[kill_at]})" if kill_at < len(names) else " (after the last)")
            proc = self._cli_spawn(argv, kill_at, True)
            rc = proc.wait(timeout=600)
        else:
            delay = fraction * self.estimate.get(name, 1.5)
            what = f"at {delay * 1000:.0f} ms"
            proc = self._cli_spawn(argv, None, False)
            try:
                rc = proc.wait(timeout=delay)
            except subprocess.TimeoutExpired:
                os.kill(proc.pid, signal.SIGKILL)
                rc = proc.wait()
        f.kills[name] += 1
        f.modes[(name, "step" if mode == "sweep" else mode)] += 1
        returned = error = None
        if rc == 0:
            f.after_return[name] += 1
            returned = self._cli_returned(rnd, verb, begin)
        elif rc == -signal.SIGKILL:
            f.in_call[name] += 1
        else:
            f.raised[name] += 1
            error = dict(message=f"exit status {rc}")
            f.notes.append(f"round {rnd} {name}: the command refused (exit status {rc}; see {self.stderr_path})")
        self._check(rnd, verb, name, begin, returned, error, what, before_temps, started)

    # -- one round ---------------------------------------------------------------------------------
    def spawn(self, rnd: int, verb: str, *, exit_after: bool = False, kill_at_step: int | None = None,
              kill_at_file: float | None = None):
        spec = dict(folder=str(self.folder), verb=verb, log=str(self.log_path), round=rnd,
                    seed=f"{self.seed}/{rnd}", dests={k: str(v) for k, v in self.dests.items()}, exit=exit_after,
                    kill_at_step=kill_at_step, kill_at_file=kill_at_file)
        env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
        err = open(self.stderr_path, "a")
        err.write(f"--- round {rnd} {verb}\n")
        err.flush()
        # Unbuffered: a buffered reader could take BEGIN and DONE in one read, and select() would
        # then wait for a line already read.
        return subprocess.Popen([sys.executable, "-m", "benchmarks.fault_kill", "--driver", json.dumps(spec)],
                                cwd=ROOT, env=env, stdout=subprocess.PIPE, stderr=err, bufsize=0)

    def _events(self, rnd: int) -> list[dict]:
        out = []
        with open(self.log_path, encoding="utf-8") as f:
            for line in f:
                try:
                    e = json.loads(line)
                except ValueError:
                    continue  # a line cut by the kill was never fsynced as complete: not returned
                if e["round"] == rnd:
                    out.append(e)
        return out

    @staticmethod
    def _wait_line(proc, timeout: float) -> str | None:
        ready, _, _ = select.select([proc.stdout], [], [], timeout)
        return proc.stdout.readline().decode(errors="replace").strip() if ready else None   # byte by byte

    def _learn(self, events: list[dict]) -> None:
        for e in events:
            if e["event"] == "returned" and "seconds" in e:
                self.fig.durations[e["verb"]].append(e["seconds"])
                self.estimate[e["verb"]] = e["seconds"]
                self.steps[e["verb"]] = e["steps"]
                self.step_names[e["verb"]] = e.get("step_names", [])

    def calibrate(self) -> None:
        """Each verb once, not killed: its duration is the first estimate for the kill delays."""
        for i, verb in enumerate(VERBS):
            rnd = -1 - i
            if verb == "scan":
                self.change_folder(rnd)
            proc = self.spawn(rnd, verb, exit_after=True)
            out = proc.communicate(timeout=900)[0].decode(errors="replace")
            events = self._events(rnd)
            self._learn(events)
            self.record_returned(events)
            if "DONE" not in out:
                self.fig.notes.append(f"calibration {verb} did not finish: {out.strip()} (see {self.stderr_path})")
            self.next_run(rnd)

    def record_returned(self, events: list[dict]) -> None:
        for k, e in enumerate(events):
            if e["event"] != "returned":
                continue
            e = dict(e, key=(e["round"], k))
            self.returned.append(e)
            if e["verb"] in DECISION_VERBS:
                self.fig.returned_decisions.add(e["key"])
            else:
                self.fig.other_returned[e["verb"]] += 1

    def round(self, rnd: int, verb: str, fraction: float, mode: str) -> None:
        f = self.fig
        started = time.perf_counter()
        kill_at = None
        if verb == "scan":
            self.change_folder(rnd)
        if mode in ("step", "sweep"):
            kill_at = int(fraction if mode == "sweep" else fraction * (self.steps.get(verb, 0) + 1))
            names = self.step_names.get(verb, [])
            what = f"before step {kill_at}/{self.steps.get(verb, 0)}" + (
                f" ({names[kill_at]})" if kill_at < len(names) else " (after the last)")
        elif mode == "file":
            what = f"after hashing {fraction:.0%} of the files"
        else:
            delay = fraction * self.estimate.get(verb, 0.05)
            what = f"at {delay * 1000:.1f} ms"
        before_temps = set(self.temporaries())
        proc = self.spawn(rnd, verb, kill_at_step=kill_at, kill_at_file=fraction if mode == "file" else None)
        first = self._wait_line(proc, 600)
        if first != "BEGIN":
            proc.kill()
            proc.wait()
            f.notes.append(f"round {rnd} {verb}: the driver did not reach the call ({first or 'no output'}; "
                           f"see {self.stderr_path})")
            events = self._events(rnd)
            self.record_returned(events)
            self.next_run(rnd)
            return
        if mode in ("step", "sweep", "file"):
            self._wait_line(proc, 600)   # the driver kills itself at its step, or says DONE / ERROR
        else:
            t0 = time.perf_counter()
            time.sleep(max(0.0, delay - (time.perf_counter() - t0)))
        if proc.poll() is None:
            os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
        f.modes[(verb, "step" if mode == "sweep" else mode)] += 1
        f.kills[verb] += 1
        events = self._events(rnd)
        begin = next(e for e in events if e["event"] == "begin")
        returned = next((e for e in events if e["event"] == "returned" and not e.get("background")), None)
        error = next((e for e in events if e["event"] == "error"), None)
        if error:
            f.raised[verb] += 1
            f.notes.append(f"round {rnd} {verb}: the call refused: {error['message']}")
        elif returned:
            f.after_return[verb] += 1
        else:
            f.in_call[verb] += 1
            if verb == "scan":
                read = [e for e in events if e["event"] == "phase" and e["stage"] == "reading files"
                        and e["done"] == e["total"]]
                f.scan_phase["embedding" if read else "hashing"] += 1
        self._learn(events)
        self.record_returned(events)
        self._check(rnd, verb, verb, begin, returned, error, what, before_temps, started)

    def _check(self, rnd: int, verb: str, name: str, begin: dict, returned: dict | None, error: dict | None,
               what: str, before_temps: set, started: float) -> None:
        """Checks on the store and the exports exactly as the kill left them, then the next run."""
        f = self.fig
        temps = set(self.temporaries()) - before_temps
        f.temporaries_after_kill += [f"round {rnd} ({name}): {t}" for t in sorted(temps)]
        ok = self.integrity()
        if ok != "ok":
            f.integrity_failures.append(f"round {rnd} ({name}): {ok}")
        s = self._snapshot()
        for e in self.returned:
            if e["verb"] in DECISION_VERBS or e["verb"] == "relearn":
                why = self.missing(e, s)
                if why:
                    if e["verb"] in DECISION_VERBS:
                        f.lost.setdefault(e["key"], f"round {rnd} ({name}) found: {why}")
                    elif why not in f.other_lost:
                        f.other_lost.append(why)
        if returned and verb == "scan":
            if (len(s["photos"]) != returned["photos"]
                    or _sha("\n".join(s["photos"]).encode()) != returned["paths_sha"]):
                f.other_lost.append(f"round {rnd}: the returned scan's catalogue ({returned['photos']} photos) "
                                    f"is not the store's ({len(s['photos'])})")
        if not returned and not error:
            why = self.half_done(begin, s)
            if why:
                f.half.append(f"round {rnd} ({name}): {why} [killed {what}]")
        self.check_exports(rnd, verb, returned if verb == "export" else None, what)

        self.next_run(rnd)
        for t in self.temporaries():
            f.leftover_temporaries.setdefault(t, f"round {rnd} ({name}, killed {what})")
        if self.verbose:
            state = "error" if error else "after return" if returned else "in call"
            print(f"round {rnd:3d} {name:11s} {what:>44s}  {state:12s} "
                  f"lost {len(f.lost)} half {len(f.half)} partial {len(f.partial_exports)} "
                  f"temps {len(f.leftover_temporaries)}  ({time.perf_counter() - started:.1f} s)", flush=True)


# ------------------------------------------------------------------ the run

def plan(kills: int, seed: int, verbs=VERBS) -> list[tuple[str, float, str]]:
    """Verbs in shuffled blocks of all eight (so every verb comes up once kills >= 8). Each kill
    lands at a fraction of the verb's last measured duration ("clock": SIGKILL from this process),
    of its steps ("step": the driver SIGKILLs itself before that store statement or file
    operation) or, for scans, of the files it reads and hashes ("file"). A verb's kills take the
    modes in turn, starting with a random one."""
    rng = random.Random(seed)
    order: list[str] = []
    while len(order) < kills:
        block = list(VERBS)
        rng.shuffle(block)
        order += [v for v in block if v in verbs]
    modes = {v: ("clock", "step", "file") if v == "scan" else ("clock", "step") for v in VERBS}
    turn = {v: rng.randrange(len(modes[v])) for v in VERBS}
    out = []
    for v in order[:kills]:
        out.append((v, rng.random(), modes[v][turn[v] % len(modes[v])]))
        turn[v] += 1
    return out


def prepare(work: Path, source: Path, scanned: Path | None) -> None:
    work.mkdir(parents=True, exist_ok=True)
    folder = work / "photos"
    if folder.exists():
        raise SystemExit(f"{work} is not empty; give a new --work folder")
    if scanned is not None:
        shutil.copytree(scanned, folder, symlinks=True)
    else:
        shutil.copytree(source, folder, ignore=shutil.ignore_patterns(".kinfold"), symlinks=True)
        from core.project import Project

        with Project.open(folder, annotator="fault-kill") as p:
            p.scan()
    (work / "exports").mkdir()


def run(kills: int = 100, seed: int = 0, work: Path | None = None, source: Path = ROOT / "sample_images",
        scanned: Path | None = None, added: int = 24, verbose: bool = True, calibrate: bool = True,
        verbs=VERBS, sweep: bool = False, cli_kills: int = 10, cli_verbs=CLI_VERBS) -> Figures:
    """The whole test; `calibrate=False` skips timing each verb first (its first kill then uses a
    rough guess of the duration and of the steps). `sweep` replaces the random plan: each verb of
    `verbs` is killed once before each of its steps, in order (the steps counted in calibration).
    Then `cli_kills` kills of the command line (`cli_verbs` in turn, by clock and at a step by
    turns; with `sweep`, each of them before each of its steps)."""
    work = Path(work) if work else Path(tempfile.mkdtemp(prefix="kinfold-fault-"))
    t0 = time.perf_counter()
    prepare(work, source, scanned)
    c = Checker(work, seed, added, verbose)
    if calibrate:
        c.calibrate()
    if verbose:
        print("calibration (s): " + ", ".join(f"{v} {c.estimate.get(v, float('nan')):.3f}" for v in VERBS),
              flush=True)
    if cli_verbs and (cli_kills or sweep) and calibrate:
        c.calibrate_cli()
    if sweep:
        rounds = [(v, k, "sweep") for v in verbs for k in range(c.steps[v] + 1)]
        cli_rounds = [(v, k, "sweep") for v in cli_verbs for k in range(c.steps[f"cli {v}"] + 1)]
    else:
        rounds = plan(kills, seed, verbs)
        rng = random.Random(f"{seed}/cli")
        cli_rounds = [(cli_verbs[i % len(cli_verbs)], rng.random(), ("clock", "step")[(i + i // len(cli_verbs)) % 2])
                      for i in range(cli_kills if cli_verbs else 0)]
    for rnd, (verb, fraction, mode) in enumerate(rounds):
        c.round(rnd, verb, fraction, mode)
    for rnd, (verb, fraction, mode) in enumerate(cli_rounds, start=len(rounds)):
        c.cli_round(rnd, verb, fraction, mode)
    c.fig.notes.append(f"work folder {work}; {time.perf_counter() - t0:.0f} s in all")
    return c.fig


def report(fig: Figures, rerun: str) -> str:
    lines = [f"Kinfold fault test: {sum(fig.kills.values())} SIGKILLs ({rerun})", "",
             f"{'verb':11s} {'kills':>3s} {'by clock':>9s} {'at a step':>10s} {'at a file':>10s} {'in call':>8s} "
             f"{'after return':>13s} {'refused':>8s} {'median s':>9s}"]
    for v in VERBS + tuple(f"cli {v}" for v in CLI_VERBS):
        d = sorted(fig.durations.get(v, []))
        med = f"{d[len(d) // 2]:.3f}" if d else "-"
        lines.append(f"{v:11s} {fig.kills[v]:3d} {fig.modes[(v, 'clock')]:9d} {fig.modes[(v, 'step')]:10d} "
                     f"{fig.modes[(v, 'file')]:10d} {fig.in_call[v]:8d} {fig.after_return[v]:13d} {fig.raised[v]:8d} "
                     f"{med:>9s}")
    lines.append(f"scans killed before all files were read and hashed: {fig.scan_phase['hashing']}, while "
                 f"embedding or writing the catalogue: {fig.scan_phase['embedding']}")
    lines += ["",
              f"decisions returned before kills:     {len(fig.returned_decisions)}",
              f"decisions found in the store:        {fig.found}",
              f"lost:                                {len(fig.lost)}   (target 0)",
              f"other returned calls (scan, relearn, export) not in the store as returned: "
              f"{len(fig.other_lost)} of {sum(fig.other_returned.values())}   (target 0)",
              f"integrity failures:                  {len(fig.integrity_failures)}   (target 0)",
              f"half-done decisions (killed calls):  {len(fig.half)}   (target 0)",
              f"partial exports:                     {len(fig.partial_exports)}   (target 0)",
              f"  killed exports replaced by a complete newer one: {fig.new_exports} "
              f"(of which mixing two exports' formats: {fig.mixed_exports})",
              f"temporaries left by the kills:       {len(fig.temporaries_after_kill)}",
              f"leftover temporaries after the next run: {len(fig.leftover_temporaries)}   (target 0)",
              f"next open/scan/propose/export failures: {len(fig.next_run_failures)}   (target 0)"]

    def listing(title, items, n=12):
        items = list(items)
        if items:
            lines.append(f"{title}:")
            lines.extend(f"  {x}" for x in items[:n])
            if len(items) > n:
                lines.append(f"  ... {len(items) - n} more")

    listing("lost", fig.lost.values())
    listing("returned calls not in the store", fig.other_lost)
    listing("integrity failures", fig.integrity_failures)
    listing("half-done decisions", fig.half)
    listing("partial exports", fig.partial_exports)
    listing("leftover temporaries (path [what made it]: round after which the next run left it)",
            (f"{k} [{temporary_kind(Path(k).name)}]: {v}" for k, v in fig.leftover_temporaries.items()))
    listing("next-run failures", fig.next_run_failures)
    listing("notes", fig.notes, 30)
    lines.append(f"rerun: python -m benchmarks.fault_kill {rerun}")
    return "\n".join(lines)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--kills", type=int, default=100)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--work", type=Path, help="a new folder for the copy, logs and exports (default: a temp folder)")
    ap.add_argument("--source", type=Path, default=ROOT / "sample_images", help="the photo folder to copy")
    ap.add_argument("--scanned", type=Path, help="copy this already scanned folder (store included) instead")
    ap.add_argument("--added", type=int, default=24, help="new photos before each scan round")
    ap.add_argument("--verbs", default=",".join(VERBS), help="kill only these verbs (comma-separated)")
    ap.add_argument("--sweep", action="store_true",
                    help="instead of --kills random kills: kill each verb once before each of its steps")
    ap.add_argument("--cli-kills", type=int, default=10,
                    help="then kill `python -m app.cli accept/export` this many times (default 10)")
    ap.add_argument("--cli-verbs", default=",".join(CLI_VERBS), help="the commands killed (comma-separated)")
    ap.add_argument("--quiet", action="store_true")
    ap.add_argument("--driver", help=argparse.SUPPRESS)
    ap.add_argument("--cli-driver", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.driver:
        driver(json.loads(args.driver))
        return 0
    if args.cli_driver:
        return cli_driver(json.loads(args.cli_driver))
    verbs = tuple(v.strip() for v in args.verbs.split(",") if v.strip())
    unknown = sorted(set(verbs) - set(VERBS))
    if unknown:
        ap.error(f"unknown verb(s) {', '.join(unknown)}; choose from {', '.join(VERBS)}")
    cli_verbs = tuple(v.strip() for v in args.cli_verbs.split(",") if v.strip())
    if set(cli_verbs) - set(CLI_VERBS):
        ap.error(f"--cli-verbs: choose from {', '.join(CLI_VERBS)}")
    fig = run(args.kills, args.seed, args.work, args.source, args.scanned, args.added, not args.quiet,
              verbs=verbs, sweep=args.sweep, cli_kills=args.cli_kills, cli_verbs=cli_verbs)
    rerun = "--sweep" if args.sweep else f"--kills {args.kills} --seed {args.seed} --cli-kills {args.cli_kills}"
    if verbs != VERBS:
        rerun += f" --verbs {','.join(verbs)}"
    if cli_verbs != CLI_VERBS:
        rerun += f" --cli-verbs {','.join(cli_verbs)}"
    print(report(fig, rerun), flush=True)
    bad = (fig.lost or fig.other_lost or fig.integrity_failures or fig.half or fig.partial_exports
           or fig.leftover_temporaries or fig.next_run_failures)
    return 1 if bad else 0


if __name__ == "__main__":
    raise SystemExit(main())
