"""`Project`: the verbs of Kinfold. The CLI, the app and the benchmarks all call these.

Example (runs on the demo folder; the first scan embeds a few hundred photos in under a minute):

    >>> from core.project import Project
    >>> p = Project.open("sample_images")
    >>> report = p.scan()
    >>> groups = p.propose(limit=5)
    >>> g = groups[0]
    >>> p.accept(g.id, "hex nut", drop=g.members[-1:])   # label all but the last member
    >>> p.status().by_label
    {'hex nut': ...}
    >>> p.export_csv("labels.csv")
"""
from __future__ import annotations

import contextlib
import functools
import getpass
import hashlib
import json
import os
import threading
import time
import unicodedata
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterable, Sequence

import numpy as np

from core import catalogue, export, mistakes, neighbours, proposals
from core.store import LabelRow, PhotoRow, Store, StoreError, utc_now

Progress = Callable[[int, int, str], None]
Cancel = Callable[[], bool]

STORE_DIR = ".kinfold"
DEFAULT_EXTRACTOR = "efficientnet-lite0"
_EMBED_CHUNK = 1024          # photos embedded and committed per step, so a crash loses at most this
_SKIPPED_FORMAT = 2          # remembered skips: final failures only, reasons without absolute paths
_UNDOABLE = ("accept", "label", "set_aside", "clear", "split", "later", "confirm", "import", "rename")
# Groups are formed this many at a time (each batch ranked on its own), so the first groups do not
# depend on how many are asked for. 3 is what the yield figures were measured with (the simulator
# asks for 3 at a time): with hold=1 its run on Fashion-MNIST 2,000 is the same, group for group,
# as before group numbers were kept (yield@80 3.691).
PROPOSAL_BATCH = 3
# What the neighbour graph is built with; all of it is part of the graph cache's key.
_GRAPH_SETTINGS = dict(k=64, temperature=0.1, burst_threshold=0.97, centre=True)
_GRAPH_FORMAT = 3          # 3: no features inside (the graph is handed them), their mean kept
_GRAPH_FIELDS = ("sims", "idx", "entropy", "mutual", "burst")


class ProjectError(Exception):
    """A request Kinfold cannot carry out; the message says why, in one line."""


class FolderInUse(ProjectError):
    """The folder's project is open in another Kinfold window or command (its lock is held)."""


@dataclass
class ScanReport:
    photos: int                                   # photos ready to propose
    new: int                                      # new photos ready (files left out are in skipped)
    changed: int
    removed: int
    embedded: int                                 # photos embedded by this scan
    skipped: list[tuple[str, str]]                # (path, reason) for every file left out
    cancelled: bool = False
    seconds: float = 0.0


@dataclass
class Proposal:
    id: int
    members: list[str]                            # relative POSIX paths, anchor first
    trust: float
    suggested_label: str | None
    confidence: float | None
    kind: str                                     # "new area", "probable label" or "split part"

    @property
    def splittable(self) -> bool:
        """Whether `split` is offered: below MIN_SPLIT photos, taking members out is no more work."""
        return len(self.members) >= proposals.MIN_SPLIT


@dataclass
class Status:
    photos: int
    labelled: int
    set_aside: int
    unlabelled: int
    by_label: dict[str, int]
    actions: int                                  # decisions recorded, undo not counted
    skipped: int
    relearned_version: int | None = None


@dataclass
class _Lock:
    path: Path
    handle: object = field(default=None, repr=False)

    def acquire(self) -> None:
        try:
            import fcntl
        except ImportError:  # not POSIX: no cross-process lock
            return
        self.handle = open(self.path, "a+")
        try:
            fcntl.flock(self.handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            self.handle.close()
            self.handle = None
            raise FolderInUse(f"this folder is already open in another Kinfold window or command "
                               f"(lock {self.path}); close it there first") from None

    def release(self) -> None:
        if self.handle is not None:
            self.handle.close()
            self.handle = None


def _serialised(method):
    """Run a public verb under the project's lock: the GUI thread and its workers share one Project,
    and its in-memory state (catalogue arrays, graph, classifier cache) changes as a whole."""
    @functools.wraps(method)
    def wrapper(self, *args, **kwargs):
        with self._mutex:
            return method(self, *args, **kwargs)
    return wrapper


def clean_label(label: str) -> str:
    if not isinstance(label, str):
        raise ProjectError("a label must be text")
    label = unicodedata.normalize("NFC", " ".join(label.split()))
    if not label:
        raise ProjectError("a label cannot be empty")
    if any(unicodedata.category(ch).startswith("C") for ch in label):
        raise ProjectError(f"label {label!r} contains control characters")
    if len(label) > 200:
        raise ProjectError("a label is at most 200 characters")
    return label


class Project:
    def __init__(self, folder: Path, store: Store, annotator: str, extractor: str, lock: _Lock | None):
        self.folder = folder
        self.store = store
        self.annotator = annotator
        self.extractor_name = extractor
        self._lock = lock
        self._mutex = threading.RLock()
        self._extractor = None
        self._graph: neighbours.Graph | None = None
        self._open_vectors()
        self._load_catalogue()

    # -- opening -----------------------------------------------------------------------------
    @classmethod
    def open(cls, folder, store=None, *, extractor: str = DEFAULT_EXTRACTOR, annotator: str | None = None,
             lock: bool = True) -> "Project":
        """Create or reopen the project of `folder`. The store defaults to `<folder>/.kinfold/`;
        pass `store=` for a separate location (a read-only folder, say)."""
        if folder is None or not str(folder).strip():
            raise ProjectError("no photo folder given (the name is empty); name the folder, '.' for the "
                               "current one")
        if store is not None and not str(store).strip():
            raise ProjectError(f"the store location is empty; name a folder, or leave it out to keep the "
                               f"store in FOLDER/{STORE_DIR}")
        folder = Path(folder).expanduser().resolve()
        if not folder.is_dir():
            raise ProjectError(f"{folder} is not a folder")
        store_dir = Path(store).expanduser().resolve() if store is not None else folder / STORE_DIR
        if cls._hides_photos(store_dir, folder):
            raise ProjectError(f"the store {store_dir} is inside the photo folder {folder}, so the photos "
                               f"under it would be left out of every scan; keep it outside the folder, or "
                               f"leave the store out to use {folder / STORE_DIR}")
        try:
            st = Store(store_dir)
        except StoreError as exc:
            raise ProjectError(str(exc)) from exc
        lk = None
        if lock and not st.read_only:  # a read-only store cannot be changed, so it needs no lock
            lk = _Lock(store_dir / "lock")
            try:
                lk.acquire()
            except ProjectError:
                st.close()
                raise
        return cls(folder, st, annotator or _default_annotator(), extractor, lk)

    @staticmethod
    def _hides_photos(store_dir: Path, folder: Path) -> bool:
        """Whether a store there would hide photos from the scan: it lies in the photo folder (or is
        it) and not within a hidden folder, which the scan leaves out anyway (the default `.kinfold`)."""
        if not store_dir.is_relative_to(folder):
            return False
        return not any(part.startswith(".") for part in store_dir.relative_to(folder).parts)

    @_serialised
    def close(self) -> None:
        self.store.close()
        if self._lock:
            self._lock.release()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    # -- catalogue and embeddings ------------------------------------------------------------
    @property
    def extractor_id(self) -> str | None:
        return self.store.get_setting("extractor_id")

    def _load_catalogue(self) -> None:
        rows = self.store.photos()
        ext = self.extractor_id
        embedded = self.store.embedded_fingerprints(ext) if ext else set()
        self._rows: list[PhotoRow] = [r for r in rows if r.fingerprint in embedded]
        self._index = {r.path: i for i, r in enumerate(self._rows)}
        self._features_map = None            # read when first needed (`_features`)
        self._graph = None
        self._graph_version = None
        self._classifier_cache: tuple = (None, None)

    def extractor(self):
        if self._extractor is None:
            from core.embedding import get_extractor  # torch loads only when a scan needs it
            self._extractor = get_extractor(self.extractor_name)
        return self._extractor

    def scan(self, progress: Progress | None = None, cancel: Cancel | None = None) -> ScanReport:
        """Find new and changed photos and embed those not embedded yet. Safe to cancel: what was
        embedded is kept, and the next scan goes on from there. A file that is not a readable photo
        is remembered as skipped; a failure that may pass (I/O, memory, the network) is reported in
        `skipped` for this scan only and tried again by the next one."""
        t0 = time.perf_counter()
        previous = {r.path: r for r in self.store.photos()}
        # Skips remembered before reasons were checked for being final (and named no path) are
        # looked at once more.
        remembered = self.store.skipped() if self.store.get_setting("skipped_format") == _SKIPPED_FORMAT else {}
        try:
            cat = catalogue.scan_folder(self.folder, previous, remembered, progress=progress, cancel=cancel)
        except OSError as exc:  # the folder itself cannot be listed (gone, no permission, I/O error)
            raise ProjectError(f"cannot read the folder {self.folder}: {exc.strerror or exc}") from exc
        failed: dict[str, str] = {}
        retry = dict(cat.retry)
        embedded = 0
        cancelled = cat.cancelled or bool(cancel and cancel())
        todo: dict[str, PhotoRow] = {}
        paths_of: dict[str, list[str]] = {}
        if not cancelled:  # a cancelled scan does not wait for the network to load
            extractor = self.extractor()
            self.store.set_setting("extractor_id", extractor.id)
            done_fps = self.store.embedded_fingerprints(extractor.id)
            for r in cat.photos:
                paths_of.setdefault(r.fingerprint, []).append(r.path)
                if r.fingerprint not in done_fps:
                    todo.setdefault(r.fingerprint, r)
        todo_rows = list(todo.values())
        if todo_rows:
            from core.embedding import embed_files

            for start in range(0, len(todo_rows), _EMBED_CHUNK):
                chunk = todo_rows[start:start + _EMBED_CHUNK]
                # Progress counts across the whole scan (every earlier chunk was embedded or unreadable).
                res = embed_files([self.folder / r.path for r in chunk], extractor, progress=progress,
                                  cancel=cancel, counted=(embedded, start - embedded, len(todo_rows)))
                self.store.put_embeddings(extractor.id, [chunk[i].fingerprint for i in res.ok], res.vectors)
                embedded += len(res.ok)
                for i, reason in res.failed:
                    failed[chunk[i].fingerprint] = reason
                for i, reason in res.retry:
                    # The photo stays catalogued without an embedding, so the next scan embeds it.
                    retry.update((path, reason) for path in paths_of[chunk[i].fingerprint])
                if res.cancelled:
                    cancelled = True
                    break
        skipped = dict(cat.skipped)
        photos = []
        for r in cat.photos:
            if r.fingerprint in failed:
                skipped[r.path] = (r.size, r.mtime_ns, failed[r.fingerprint])
            else:
                photos.append(r)
        with self._mutex:
            self.store.replace_catalogue(photos, skipped)
            self.store.set_setting("skipped_format", _SKIPPED_FORMAT)
            self._load_catalogue()
            self._compact_vectors()
        shown = [(p, v[2]) for p, v in skipped.items()]
        shown += [(p, f"{reason} (tried again at the next scan)") for p, reason in retry.items()]
        ready = {r.path for r in photos}  # new and changed count photos, not files later left out
        return ScanReport(photos=len(self._rows), new=sum(p in ready for p in cat.new),
                          changed=sum(p in ready for p in cat.changed),
                          removed=len(cat.removed), embedded=embedded, skipped=sorted(shown),
                          cancelled=cancelled, seconds=time.perf_counter() - t0)

    # -- geometry ----------------------------------------------------------------------------
    def _geometry_version(self) -> int | None:
        """The active relearned version when it adapts the embedding; None when proposals work in the
        backbone's geometry (no version, or a version with the label classifier only)."""
        version = self.store.active_relearn_version()
        if version is None:
            return None
        from core import relearning

        return version if relearning.has_head(self.store.relearn_state(version)) else None

    @_serialised
    def features(self) -> np.ndarray:
        """The embedding proposals work in: the backbone's, or the relearned one when active."""
        version = self._geometry_version()
        if version is None:
            return self._features
        from core import relearning

        return relearning.apply(self.store.relearn_state(version), self._features)

    @_serialised
    def label_classifier(self, names: list[str]) -> np.ndarray | None:
        """(photos, len(names)) label probabilities from the active version's classifier (NaN for
        labels it was not fitted on), or None without one."""
        version = self.store.active_relearn_version()
        if version is None or not self._rows:
            return None
        key = (version, len(self._rows), tuple(names))
        if self._classifier_cache[0] != key:
            from core import relearning

            clf = relearning.load_classifier(self.store.relearn_state(version))
            prob = None if clf is None else clf.probabilities(self._features, names)
            self._classifier_cache = (key, prob)
        return self._classifier_cache[1]

    @_serialised
    def graph(self) -> neighbours.Graph:
        version = self.store.active_relearn_version()
        if self._graph is None or self._graph_version != version:
            self._graph = self._load_or_build_graph()
            self._graph_version = version
        return self._graph

    def _load_or_build_graph(self, progress: Progress | None = None, cancel: Cancel | None = None) -> neighbours.Graph:
        """The neighbour graph, from the cache in the store folder when it was built from exactly these
        features with exactly these settings; a cache that fails to load for any reason is rebuilt.
        The graph holds no copy of the features: it is handed them (`Graph.rows`)."""
        feats = self.features()
        key = hashlib.sha1(json.dumps(dict(
            format=_GRAPH_FORMAT, settings=_GRAPH_SETTINGS, extractor=self.extractor_id, shape=feats.shape,
            neighbours=neighbours.settings_key()), sort_keys=True).encode())
        for r in self._rows:
            key.update(r.fingerprint.encode())
        # The features themselves: the extractor's output, the photos and their order, and the
        # relearned version's head when it adapts the embedding. The backbone's features are named by
        # their vectors file (its token changes with every rewrite, rows are only ever appended), so
        # they are not read to make the key; other features are hashed.
        entry = self.store.vectors.file_entry(self.extractor_id) if self.extractor_id else None
        if feats is self._features and entry is not None:
            key.update(json.dumps(["vectors", *entry]).encode())
        else:
            key.update(np.ascontiguousarray(feats, np.float32).tobytes())
        cache = self.store.directory / f"graph-{key.hexdigest()[:16]}.npz"
        centre = _GRAPH_SETTINGS.get("centre", True)
        if cache.exists():
            try:
                with np.load(cache, allow_pickle=False) as z:
                    g = neighbours.Graph(**{k: z[k] for k in _GRAPH_FIELDS})
                    mean = z["mean"] if centre else None
                _check_graph(g, len(self._rows))
                return g.attach(neighbours.Source(feats, centre=centre, mean=mean))
            except Exception:  # truncated (BadZipFile, EOFError), pickled, garbage, wrong shapes...
                try:
                    cache.unlink(missing_ok=True)
                except OSError:
                    pass  # a read-only store keeps its damaged cache; the graph is rebuilt in memory
        g = neighbours.build_graph(feats, **_GRAPH_SETTINGS, progress=progress, cancel=cancel)
        tmp = cache.with_name(f"graph-{os.getpid()}-{threading.get_ident()}.tmp.npz")
        try:
            mean = g.source.mean if g.source.mean is not None else np.zeros(0, np.float32)
            np.savez(tmp, mean=mean, **{k: getattr(g, k) for k in _GRAPH_FIELDS})
            os.replace(tmp, cache)
            for old in self.store.directory.glob("graph-*.npz"):
                if old != cache:
                    old.unlink(missing_ok=True)
        except OSError:  # a read-only store or a full disk: the graph is kept in memory only
            try:
                tmp.unlink(missing_ok=True)
            except OSError:
                pass
        return g

    def _paths_to_indices(self, paths: Iterable[str]) -> list[int]:
        out = []
        for p in paths:
            p = Path(p).as_posix() if not isinstance(p, str) else p
            if p not in self._index:
                raise ProjectError(f"{p} is not a photo of this project (run scan first?)")
            out.append(self._index[p])
        return out

    @_serialised
    def _state_arrays(self):
        labels = self.store.labels()
        names = sorted({r.label for r in labels.values() if r.state == "labelled"})
        pos = {n: i for i, n in enumerate(names)}
        n = len(self._rows)
        state = np.zeros(n, np.int8)
        label_of = np.full(n, -1, np.int64)
        self._not_label = np.zeros((n, len(names)), bool)
        rejections = self.store.rejections()
        for i, r in enumerate(self._rows):
            for lab in rejections.get(r.fingerprint, ()):
                if lab in pos:
                    self._not_label[i, pos[lab]] = True
            lr = labels.get(r.fingerprint)
            if lr is None:
                continue
            if lr.state == "labelled":
                state[i] = proposals.LABELLED
                label_of[i] = pos[lr.label]
            else:
                state[i] = proposals.SET_ASIDE
        return state, label_of, names

    # -- proposals ---------------------------------------------------------------------------
    @_serialised
    def propose(self, limit: int = 20, settings: proposals.Settings | None = None, *,
                hold: int | None = None) -> list[Proposal]:
        """The next groups to confirm, best first; split parts (and groups brought back by undo)
        before anything else. `hold`: how many of the returned groups are held under their ids
        (None: all). A caller that shows the first group and only peeks at the next passes hold=1,
        so the groups it did not show are formed again after the next decision (photos held in
        open groups cannot join better groups that the decisions make possible).

        A group once returned keeps its id until it is decided: it stays open while its photos are
        all still free. Groups are formed PROPOSAL_BATCH at a time from the photos no open group
        holds; the queue is the open groups ranked with one new batch, then further batches, each
        ranked, as far as `limit` asks, so the first groups do not depend on `limit`. While no
        decision is made the queue stays as it is; after one, the groups not returned yet are formed
        again. A relearn or restore asks for new groups: the open ones formed under another version
        are closed."""
        if not self._rows or limit <= 0:
            return []
        s = settings or proposals.Settings()
        mark = dict(version=self.store.active_relearn_version(), decisions=self.store.decision_count(),
                    photos=len(self._rows))
        saved = self.store.get_setting("proposal_queue") or dict(mark=mark, order=[], unshown=[])
        same = saved["mark"] == mark
        new_version = saved["mark"]["version"] != mark["version"]
        unshown = set(saved["unshown"])
        state, label_of, names = self._state_arrays()
        taken = np.zeros(len(self._rows), bool)
        pinned: list[Proposal] = []
        kept: dict[int, Proposal] = {}
        close: list[int] = []
        for row in self.store.open_proposals():      # pinned first, then in the order they were made
            idx = [self._index.get(m) for m in row.members]
            if row.pinned:
                # Shown with the members still free (the others were decided one by one).
                idx = [i for i in idx if i is not None and state[i] == proposals.FREE and not taken[i]]
            elif (new_version or (row.id in unshown and not same) or not idx
                  or any(i is None or state[i] != proposals.FREE or taken[i] for i in idx)):
                idx = []                 # formed under other figures, or a member was decided or is gone
            if not idx:
                close.append(row.id)
                continue
            taken[idx] = True
            p = Proposal(row.id, [self._rows[i].path for i in idx], row.trust, row.suggested_label,
                         row.confidence, row.kind)
            if row.pinned:
                pinned.append(p)
            else:
                kept[row.id] = p

        fresh: list[dict] = []           # groups formed now, stored below; negative ids until then
        deferred = self.store.deferred()
        graph = classifier = None

        def batch() -> list[Proposal]:
            nonlocal graph, classifier
            if graph is None:
                graph, classifier = self.graph(), self.label_classifier(names)
            eligible = ~taken
            if deferred:
                rested = eligible & np.array([r.fingerprint not in deferred for r in self._rows])
                # Photos left for later come back once nothing else is left.
                if (rested & (state == proposals.FREE)).any():
                    eligible = rested
            out = []
            for gr in proposals.form_groups(graph, state, label_of, len(names), PROPOSAL_BATCH, s, eligible,
                                            self._not_label, classifier):
                taken[gr.members] = True
                fresh.append(dict(members=[self._rows[i].path for i in gr.members], trust=round(gr.trust, 4),
                                  suggested_label=None if gr.suggested_label is None else names[gr.suggested_label],
                                  confidence=None if gr.confidence is None else round(gr.confidence, 4),
                                  kind=gr.kind))
                r = fresh[-1]
                out.append(Proposal(-len(fresh), r["members"], r["trust"], r["suggested_label"], r["confidence"],
                                    r["kind"]))
            return out

        if same:
            order = [i for i in saved["order"] if i in kept]
            queue = [kept[i] for i in order] + [p for i, p in kept.items() if i not in set(order)]
        else:
            queue = _ranked(list(kept.values()) + batch(), s.explore_every)
        want = limit - len(pinned)
        while len(queue) < want:
            more = batch()
            if not more:
                break
            queue += _ranked(more, s.explore_every)

        with self.store.transaction() if (close or fresh) else _nothing():
            ids = self.store.update_open_proposals(close, fresh) if (close or fresh) else []
            for p in queue:
                if p.id < 0:
                    p.id = ids[-p.id - 1]
            new_ids = set(ids)
            shown = queue[:max(want, 0)]
            held = len(shown) if hold is None else max(hold - len(pinned), 0)
            now = dict(mark=mark, order=[p.id for p in queue],
                       unshown=[p.id for p in queue[held:] if p.id in unshown or p.id in new_ids])
            if now != saved:
                self.store.set_setting("proposal_queue", now)
        return (pinned + shown)[:limit]

    @_serialised
    def group(self, group_id: int) -> Proposal:
        row = self.store.proposal(group_id)
        if row is None:
            raise ProjectError(f"there is no group {group_id}")
        return Proposal(row.id, row.members, row.trust, row.suggested_label, row.confidence, row.kind)

    def _open_group(self, group_id: int):
        row = self.store.proposal(group_id)
        if row is None:
            raise ProjectError(f"there is no group {group_id}")
        if not self.store.is_open(group_id):
            raise ProjectError(f"group {group_id} is no longer open (already decided, or one of its photos "
                               "was); ask for proposals again")
        return row

    # -- decisions ---------------------------------------------------------------------------
    # Each decision is one transaction: its label changes, its log entry and its effect on the
    # proposals are written together or not at all.
    def _new_row(self, fp: str, state: str, label: str | None, how: str) -> LabelRow:
        return LabelRow(fp, state, label, how, self.annotator, utc_now())

    @_serialised
    def accept(self, group_id: int, label: str, drop: Sequence[str] = ()) -> int:
        """Label every member of the group but those in `drop` (they go back to the pool)."""
        label = clean_label(label)
        with self.store.transaction():
            row = self._open_group(group_id)
            drop = set(drop)
            unknown = drop - set(row.members)
            if unknown:
                raise ProjectError(f"{sorted(unknown)[0]} is not a member of group {group_id}")
            keep = [m for m in row.members if m not in drop and m in self._index]
            labels = self.store.labels()
            keep = [m for m in keep if self._rows[self._index[m]].fingerprint not in labels]
            changes = {self._rows[self._index[m]].fingerprint: self._new_row(
                self._rows[self._index[m]].fingerprint, "labelled", label, "group") for m in keep}
            rejected = [self._rows[self._index[m]].fingerprint for m in drop if m in self._index]
            return self.store.record_decision("accept", self.annotator, keep, changes, label=label,
                                              group_id=group_id, close_proposals=[group_id], rejected=rejected)

    @_serialised
    def label(self, paths: Sequence[str], label: str) -> int:
        """Label photos directly (one or many); relabels photos that already carry a label."""
        label = clean_label(label)
        idx = self._paths_to_indices(paths)
        with self.store.transaction():
            labels = self.store.labels()
            changes = {}
            for i in idx:
                fp = self._rows[i].fingerprint
                how = "relabel" if fp in labels else "single"
                changes[fp] = self._new_row(fp, "labelled", label, how)
            return self.store.record_decision("label", self.annotator, [self._rows[i].path for i in idx], changes,
                                              label=label)

    @_serialised
    def set_aside(self, paths: Sequence[str]) -> int:
        """Mark photos as belonging to no class; they are never proposed again (undo brings them back)."""
        idx = self._paths_to_indices(paths)
        changes = {self._rows[i].fingerprint: self._new_row(self._rows[i].fingerprint, "set_aside", None,
                                                            "set aside") for i in idx}
        return self.store.record_decision("set_aside", self.annotator, [self._rows[i].path for i in idx], changes)

    @_serialised
    def clear(self, paths: Sequence[str]) -> int:
        """Remove labels (or set-aside marks) so the photos return to the pool."""
        idx = self._paths_to_indices(paths)
        changes = {self._rows[i].fingerprint: None for i in idx}
        return self.store.record_decision("clear", self.annotator, [self._rows[i].path for i in idx], changes)

    @_serialised
    def split(self, group_id: int) -> list[Proposal]:
        """Break a group into two coherent parts; they come back first in the next proposals."""
        row = self._open_group(group_id)
        members = [m for m in row.members if m in self._index]
        if len(members) < proposals.MIN_SPLIT:
            raise ProjectError(f"group {group_id} has {len(members)} photos; splitting needs at least "
                               f"{proposals.MIN_SPLIT} (take the odd ones out instead)")
        g = self.graph()
        part = proposals.split_members(g.rows([self._index[m] for m in members]))
        parts = [[m for m, p in zip(members, part) if p == k] for k in (0, 1)]
        # The part holding the anchor keeps its place first.
        if members[0] in parts[1]:
            parts.reverse()
        records = [dict(members=pm, trust=row.trust, suggested_label=row.suggested_label,
                        confidence=row.confidence, kind="split part") for pm in parts if pm]
        with self.store.transaction():
            self._open_group(group_id)          # still open now that the write lock is held
            self.store.record_decision("split", self.annotator, members, {}, group_id=group_id)
            ids = self.store.add_pinned_proposals(records, close=group_id)
        return [Proposal(i, r["members"], r["trust"], r["suggested_label"], r["confidence"], r["kind"])
                for i, r in zip(ids, records)]

    @_serialised
    def defer(self, group_id: int) -> int:
        """Leave a group for later: its photos come back after everything else has been proposed.
        Logged as a 'later' decision; undo brings the group back first. Returns the decision id."""
        with self.store.transaction():
            row = self._open_group(group_id)
            members = [m for m in row.members if m in self._index]
            previous = self.store.defer(self._rows[self._index[m]].fingerprint for m in members)
            return self.store.record_decision("later", self.annotator, members, {}, group_id=group_id,
                                              close_proposals=[group_id], before=previous)

    @_serialised
    def undo(self) -> dict | None:
        """Reverse the newest decision not yet undone: a label change, a split (the whole group comes
        back first) or a 'later' (the group comes back first). Repeat to walk further back.
        Returns what was undone (`photos`: how many photos it gave back), or None when there is
        nothing left to undo."""
        with self.store.transaction():
            last = self.store.last_undoable_of(_UNDOABLE)
            if last is None:
                return None
            dec_id, kind, before, group_id = last
            if kind == "later":
                self.store.record_decision("undo", self.annotator, [], {}, undoes=dec_id)
                self.store.restore_deferred(before)
                photos = len(before)
            else:
                changes = {fp: (LabelRow(fp, *prev) if prev else None) for fp, prev in before.items()}
                self.store.record_decision("undo", self.annotator, [], changes, undoes=dec_id)
                photos = len(changes)
            if kind in ("accept", "later") and group_id is not None:
                self.store.repin_proposal(group_id)  # the group comes back first, as it was
            elif kind == "split" and group_id is not None:
                # The parts still open give way to the whole group again.
                whole = self.store.proposal(group_id)
                members = set(whole.members) if whole else set()
                parts = [r.id for r in self.store.open_proposals(pinned_only=True)
                         if r.kind == "split part" and set(r.members) <= members]
                self.store.repin_proposal(group_id, close=parts)
                photos = len(members)
        return {"decision": dec_id, "kind": kind, "photos": photos}

    # -- reading -----------------------------------------------------------------------------
    @_serialised
    def status(self) -> Status:
        labels = self.store.labels()
        by_label: dict[str, int] = {}
        labelled = aside = 0
        for r in self._rows:
            lr = labels.get(r.fingerprint)
            if lr is None:
                continue
            if lr.state == "labelled":
                labelled += 1
                by_label[lr.label] = by_label.get(lr.label, 0) + 1
            else:
                aside += 1
        return Status(photos=len(self._rows), labelled=labelled, set_aside=aside,
                      unlabelled=len(self._rows) - labelled - aside, by_label=dict(sorted(by_label.items())),
                      actions=self.store.decision_count(actions_only=True), skipped=len(self.store.skipped()),
                      relearned_version=self.store.active_relearn_version())

    @_serialised
    def photos(self) -> list[str]:
        return [r.path for r in self._rows]

    @_serialised
    def photo_info(self, path: str) -> dict:
        i = self._paths_to_indices([path])[0]
        r = self._rows[i]
        lr = self.store.labels().get(r.fingerprint)
        return dict(path=r.path, width=r.width, height=r.height, bytes=r.size, fingerprint=r.fingerprint,
                    state=lr.state if lr else "unlabelled", label=lr.label if lr else None)

    @_serialised
    def neighbours(self, path: str, k: int = 8) -> list[tuple[str, float]]:
        """The k photos most similar to `path`, with their cosine similarity."""
        i = self._paths_to_indices([path])[0]
        g = self.graph()
        return [(self._rows[j].path, float(s)) for j, s in zip(g.idx[i, :k], g.sims[i, :k]) if j >= 0]

    @_serialised
    def review(self, label: str) -> list[tuple[str, float]]:
        """Photos carrying `label`, least typical first: typicality is the cosine similarity to the
        mean of the label's other photos, so a mislabelled photo surfaces at the top."""
        state, label_of, names = self._state_arrays()
        if label not in names:
            raise ProjectError(f"no photo carries the label {label!r}")
        members = np.nonzero((state == proposals.LABELLED) & (label_of == names.index(label)))[0]
        x = self.graph().rows(members)
        total = x.sum(0)
        others = total[None, :] - x
        norms = np.maximum(np.linalg.norm(others, axis=1), 1e-12)
        typ = (x * others).sum(1) / norms if len(members) > 1 else np.ones(len(members))
        order = np.argsort(typ, kind="stable")
        return [(self._rows[members[o]].path, float(typ[o])) for o in order]

    @_serialised
    def labelled_photos(self) -> list[export.LabelledPhoto]:
        labels = self.store.labels()
        g = self.graph() if self._rows else None
        out = []
        for i, r in enumerate(self._rows):
            lr = labels.get(r.fingerprint)
            if lr is None or lr.state != "labelled":
                continue
            burst = int(g.burst[i]) if g is not None and g.burst[i] >= 0 else None
            out.append(export.LabelledPhoto(r.path, lr.label, lr.how, lr.annotator, lr.time, r.width, r.height,
                                            burst))
        return out

    # -- relearning ---------------------------------------------------------------------------
    def relearn(self, progress: Progress | None = None, seconds: float | None = None,
                cancel: Cancel | None = None, adapt_embedding: bool = False) -> dict:
        """Relearn from the decisions so far: refit the label classifier on the confirmed labels and
        the photos taken out of groups and, with `adapt_embedding`, also train the projection head
        that adapts the embedding. Stores a new version and makes it active. Never touches the
        decisions. Returns what it measured."""
        from core import relearning

        with self._mutex:
            view = _RelearnView(self)
        # The fit runs without the project's lock, so the other verbs go on meanwhile.
        result = relearning.relearn_project(view, progress=progress, seconds=seconds, cancel=cancel,
                                            settings=relearning.Settings(head=adapt_embedding))
        with self._mutex:
            self._graph = None
        return result

    @_serialised
    def restore(self, version: int | None) -> None:
        """Make an earlier relearned version active again (None: the plain backbone embedding)."""
        self.store.activate_relearn_version(version)
        self._graph = None

    def relearn_versions(self) -> list[dict]:
        return self.store.relearn_versions()

    # -- export ------------------------------------------------------------------------------
    # Nothing is written inside the photo folder or the store; an existing file that is not a
    # Kinfold export is replaced only with overwrite=True (core/export.py has the rules).
    def export(self, csv=None, coco=None, folders=None, *, split=None, seed: int = 0, mode: str = "link",
               overwrite: bool = False) -> dict:
        """Write the asked formats all or nothing: ``{"csv": rows, "coco": {...}, "folders": counts}``."""
        return export.export_all(self.labelled_photos(), csv=csv, coco=coco, folders=folders,
                                 photo_folder=self.folder, store=self.store.directory, split=split, seed=seed,
                                 mode=mode, overwrite=overwrite)

    def export_csv(self, path, *, overwrite: bool = False) -> int:
        return self.export(csv=path, overwrite=overwrite)["csv"]

    def export_coco(self, path, *, overwrite: bool = False) -> dict:
        return self.export(coco=path, overwrite=overwrite)["coco"]

    def export_folders(self, directory, split=None, *, seed: int = 0, mode: str = "link",
                       overwrite: bool = False) -> dict:
        return self.export(folders=directory, split=split, seed=seed, mode=mode, overwrite=overwrite)["folders"]

    # -- likely mistakes (core/mistakes.py) ---------------------------------------------------
    @_serialised
    def likely_mistakes(self, limit: int = 100, method: str | None = None) -> list[mistakes.Mistake]:
        """Labelled photos whose label is most likely wrong, first the likeliest, with the label the
        engine would give instead; photos whose label was confirmed are left out."""
        state, label_of, names = self._state_arrays()
        labels = self.store.labels()
        confirmed = np.array([labels[r.fingerprint].how == mistakes.CONFIRMED if r.fingerprint in labels
                              else False for r in self._rows], bool)
        found = mistakes.rank(self.graph().x, label_of, self.graph().idx, method=method or mistakes.METHOD,
                              keep=~confirmed) if self._rows else []
        return [mistakes.Mistake(self._rows[s.index].path, names[s.label],
                                 None if s.suggested is None else names[s.suggested], s.score)
                for s in found[:max(limit, 0)]]

    @_serialised
    def confirm(self, paths: Sequence[str], label: str | None = None) -> int:
        """The annotator says the label is right (with `label`: the right label is this one, a fix):
        the photos leave the likely-mistakes queue (until a later decision changes their label).
        One logged decision (kind 'confirm'), undoable; returns its id."""
        label = None if label is None else clean_label(label)
        idx = self._paths_to_indices(paths)
        with self.store.transaction():
            labels = self.store.labels()
            changes = {}
            for i in idx:
                fp = self._rows[i].fingerprint
                lr = labels.get(fp)
                if label is None and (lr is None or lr.state != "labelled"):
                    raise ProjectError(f"{self._rows[i].path} has no label to confirm")
                changes[fp] = self._new_row(fp, "labelled", label or lr.label, mistakes.CONFIRMED)
            return self.store.record_decision("confirm", self.annotator, [self._rows[i].path for i in idx],
                                              changes, label=label)

    # --- cli: statistics and the set-aside list (core/statistics.py) ---
    @_serialised
    def statistics(self) -> "statistics.Statistics":
        """Photos per label, labels per hour, suggestions accepted as they were, per annotator."""
        from core import statistics
        st = self.status()
        return statistics.from_store(self.store, st.by_label, st.photos)

    @_serialised
    def set_aside_photos(self) -> list[str]:
        """The photos set aside (belonging to no class), in catalogue order."""
        labels = self.store.labels()
        return [r.path for r in self._rows
                if r.fingerprint in labels and labels[r.fingerprint].state == "set_aside"]

    # --- import: bringing labels in, renaming and merging labels (core/label_import.py, core/label_rename.py) ---
    def import_labels(self, csv=None, coco=None, folders=None, subfolders: bool = False, *,
                      path_column: str | None = None, label_column: str | None = None, replace: bool = False,
                      dry_run: bool = False, progress: Progress | None = None, cancel: Cancel | None = None):
        """Labels from a CSV file, a COCO file, a class-folder tree (matched by content fingerprint) or the
        photo folder's own subfolder names, as one undoable decision of kind 'import'; returns an
        `ImportReport` (conflicts are kept unless `replace`; `dry_run` writes nothing)."""
        from core import label_import
        return label_import.import_labels(self, csv=csv, coco=coco, folders=folders, subfolders=subfolders,
                                          path_column=path_column, label_column=label_column, replace=replace,
                                          dry_run=dry_run, progress=progress, cancel=cancel)

    def rename_label(self, old: str, new: str, confirm: bool = False):
        """Rename a label (onto an existing one: merge) as one undoable decision of kind 'rename'; a new
        name close to an existing label raises `label_rename.NameQuestion` unless `confirm`."""
        from core import label_rename
        return label_rename.rename_label(self, old, new, confirm=confirm)


    # --- scale: embeddings in a memory-mapped file (core/vectors.py), read only when needed ---
    def _open_vectors(self) -> None:
        """Move embeddings of a store from before schema 3 into files; delete files a crash left."""
        if not self.store.read_only:
            self.store.vectors.upgrade()
            self.store.vectors.remove_stale_files()

    def _compact_vectors(self) -> None:
        """After a scan: keep only the current extractor's rows of the catalogued photos, in catalogue
        order, so `_features` is the file's memory map itself (no copy)."""
        if not self.store.read_only and self.store.vectors.compact(self.extractor_id,
                                                                    [r.fingerprint for r in self._rows]):
            self._features_map = None
            self._graph = None

    @property
    def _features(self) -> np.ndarray:
        """The backbone's embeddings of the catalogued photos (a read-only memory map when stored in
        catalogue order); read at the first call, not at opening."""
        if self._features_map is None:
            with self._mutex:
                if self._features_map is None:
                    self._features_map = (self.store.embeddings(self.extractor_id, [r.fingerprint for r in self._rows])
                                          if self._rows else np.zeros((0, 0), np.float32))
        return self._features_map

    @_serialised
    def prepare_graph(self, progress: Progress | None = None, cancel: Cancel | None = None) -> neighbours.Graph:
        """Load or build the neighbour graph now, with progress; `cancel()` returning True stops a
        build with `neighbours.Cancelled` (nothing kept)."""
        version = self.store.active_relearn_version()
        if self._graph is None or self._graph_version != version:
            self._graph = self._load_or_build_graph(progress, cancel)
            self._graph_version = version
        return self._graph


class _RelearnView:
    """What relearning reads from a project, taken under its lock, so the long fit runs without it
    while decisions go on (they count from the next relearn)."""

    def __init__(self, project: Project):
        self._features = project._features
        self._arrays = project._state_arrays()
        self._not_label = project._not_label
        self._geometry = project.features()
        self.store = project.store
        self.extractor_id = project.extractor_id

    def _state_arrays(self):
        return self._arrays

    def features(self) -> np.ndarray:
        return self._geometry


@contextlib.contextmanager
def _nothing():
    yield


def _ranked(groups: list[Proposal], every: int) -> list[Proposal]:
    """Open groups in the order of expected photos per action (proposals.order), from the figures
    stored with each, ties in the order they were made."""
    items = []
    for p in groups:
        conf = p.confidence if p.kind == "probable label" and p.confidence is not None else p.trust
        g = proposals.Group(list(range(len(p.members))), p.trust, p.kind, 0 if p.suggested_label else None,
                            p.confidence)
        g.extra["expected_yield"] = proposals.expected_yield(g, np.full(len(p.members), conf))
        g.extra["proposal"] = p
        items.append(g)
    return [g.extra["proposal"] for g in proposals.order(items, every)]


def _check_graph(g: neighbours.Graph, n: int) -> None:
    """Raise ValueError unless `g` has the shapes and indices of a graph over n photos."""
    k = g.idx.shape[1] if g.idx.ndim == 2 else -1
    ok = (g.idx.ndim == 2 and g.idx.shape == (n, k) and g.sims.shape == (n, k)
          and g.mutual.shape == (n, k) and g.entropy.shape == (n,) and g.burst.shape == (n,)
          and (n == 0 or (g.idx.min() >= -1 and g.idx.max() < n)))
    if not ok:
        raise ValueError("graph cache does not fit the catalogue")


def _default_annotator() -> str:
    try:
        return getpass.getuser()
    except Exception:  # no user database entry (containers)
        return os.environ.get("USER", "annotator")
