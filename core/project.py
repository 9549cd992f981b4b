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

import dataclasses
import functools
import getpass
import os
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterable, Sequence

import numpy as np

from core import decisions, export, geometry, mistakes, neighbours, proposal_queue, proposals, scanning
from core.decisions import UNDOABLE as _UNDOABLE, clean_label  # noqa: F401  (callers import them from here)
from core.errors import FolderInUse, ProjectError  # noqa: F401  (callers import them from here)
from core.folder_lock import FolderLock
from core.group import Group, Proposal  # noqa: F401  (Proposal: the older name)
from core.label_state import LabelState
from core.scanning import ScanReport  # noqa: F401  (callers import it from here)
from core.store import LabelRow, PhotoRow, Store, StoreError, utc_now

Progress = Callable[[int, int, str], None]
Cancel = Callable[[], bool]

STORE_DIR = ".kinfold"
DEFAULT_EXTRACTOR = "efficientnet-lite0"
# `kinfold scan --network`: the built-in networks by short name (with the generalised-mean pooling).
NETWORKS = {"lite0": "efficientnet-lite0-gem", "lite2": "efficientnet-lite2-gem"}
# The stored id's first part -> the name of the built-in EfficientNet-Lite network and pooling it was
# made with (core.embedding.efficientnet_lite_id, EFFICIENTNET_LITE2; kept here so opening a project
# never imports torch).
_LITE_BY_ID = {"efficientnet-lite0": "efficientnet-lite0-avg", "efficientnet-lite0-gem": "efficientnet-lite0-gem",
                "efficientnet-lite2-gem": "efficientnet-lite2-gem"}
_GRAPH_SETTINGS = geometry.GRAPH_SETTINGS     # the same dict (kept under its old name for callers)


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


def _serialised(method):
    """Run a public verb under the project's lock: the GUI thread and its workers share one Project,
    and its in-memory state (catalogue arrays, graph, classifier cache) changes as a whole."""
    @functools.wraps(method)
    def wrapper(self, *args, **kwargs):
        with self._mutex:
            return method(self, *args, **kwargs)
    return wrapper


class Project:
    def __init__(self, folder: Path, store: Store, annotator: str, extractor, lock: FolderLock | None):
        self.folder = folder
        self.store = store
        self.annotator = annotator
        # A name (the network loads when a scan first needs it) or an object with the Extractor
        # protocol of core/embedding.py.
        if isinstance(extractor, str) and extractor == DEFAULT_EXTRACTOR:
            extractor = self._kept_pooling(store) or extractor
        self._extractor = None if isinstance(extractor, str) else extractor
        self.extractor_name = extractor if isinstance(extractor, str) else str(extractor.id)
        self._lock = lock
        self._mutex = threading.RLock()
        self._graph: neighbours.Graph | None = None
        self._labels: LabelState | None = None
        store.after_commit(self._on_commit)
        self._open_vectors()
        self._load_catalogue()

    # -- opening -----------------------------------------------------------------------------
    @classmethod
    def open(cls, folder, store=None, *, extractor=DEFAULT_EXTRACTOR, annotator: str | None = None,
             lock: bool = True) -> "Project":
        """Create or reopen the project of `folder`. The store defaults to `<folder>/.kinfold/`;
        pass `store=` for a separate location (a read-only folder, say). `extractor`: the name of a
        built-in backbone, or any object with the `Extractor` protocol (core/embedding.py: `id`,
        `dim`, `decode_side`, `preprocess`, `embed`) to plug in a custom one."""
        if not isinstance(extractor, str):
            _check_extractor(extractor)
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
            lk = FolderLock(store_dir / "lock")
            try:
                lk.acquire()
            except ProjectError:
                st.close()
                raise
        return cls(folder, st, annotator or _default_annotator(), extractor, lk)

    @staticmethod
    def _kept_pooling(store: Store) -> str | None:
        """A project opened with the default extractor keeps the built-in EfficientNet-Lite network and
        pooling its store was scanned with (a change of the default never re-embeds a scanned folder,
        a Lite2 project stays Lite2); None for a new store or another backbone."""
        stored = store.get_setting("extractor_id")
        return _LITE_BY_ID.get(stored.partition(":")[0]) if stored else None

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
        """Forget the catalogue and everything built on it; each part is read from the store again
        when first needed (`_rows`, `_features`, `graph`, `label_state`), so opening reads none."""
        self._catalogue = None               # (rows, index by path), read by `_rows` / `_index`
        self._features_map = None            # read when first needed (`_features`)
        self._graph = None
        self._graph_version = None
        self._classifier_cache: tuple = (None, None)
        self._labels = None                  # read when first needed (`label_state`)

    def _on_commit(self, changes: list[tuple]) -> None:
        """The store's after_commit hook: each decision updates the label state in place."""
        if any(c[0] == "catalogue" for c in changes):
            self._labels = None             # a scan reloads the catalogue and the state with it
            return
        if self._labels is not None:
            try:
                self._labels.apply(changes)
            except Exception:                # never leave a half-applied state: read the tables again
                self._labels = None

    @property
    def label_state(self) -> LabelState:
        """Where every photo stands (core/label_state.py), kept up to date by each decision; read
        from the tables when first needed."""
        if self._labels is None:
            with self._mutex:
                if self._labels is not None:
                    return self._labels
                state = LabelState.load(self.store, [r.fingerprint for r in self._rows])
                if self._store_has_pending_changes():
                    return state    # read mid-transaction: its commit would be applied twice; read again after
                self._labels = state
        return self._labels

    @_serialised
    def reload(self) -> None:
        """Read the catalogue, embeddings and label state from the store again (after the store was
        changed other than through this project's verbs, e.g. a benchmark wiping its decisions)."""
        self._load_catalogue()

    @_serialised
    def label_arrays(self) -> tuple[np.ndarray, np.ndarray, list[str]]:
        """(state, label_of, names): per photo FREE / LABELLED / SET_ASIDE (core.proposals), the index
        of its label in `names` (-1 when none), and the sorted label names. Copies, safe to keep."""
        return self.label_state.arrays()

    def extractor(self):
        if self._extractor is None:
            from core.embedding import get_extractor  # torch loads only when a scan needs it
            self._extractor = get_extractor(self.extractor_name)
        return self._extractor

    def scan(self, progress: Progress | None = None, cancel: Cancel | None = None, cluster=None,
             **cluster_options) -> ScanReport:
        """Find new and changed photos and embed those not embedded yet (core/scanning.py). Safe to
        cancel: what was embedded is kept, and the next scan goes on from there. A file that is not a
        readable photo is remembered as skipped; a failure that may pass (I/O, memory, the network) is
        reported in `skipped` for this scan only and tried again by the next one.

        `cluster`: embed on Dask instead of in this process: a number of local worker processes, a
        scheduler address "tcp://host:port" or an open distributed.Client (core/cluster_scan.py;
        `cluster_options` go to its `embed_rows`: chunk, transfer, threads). A scheduler lost mid-scan
        raises ProjectError once the catalogue and everything embedded are stored."""
        return scanning.scan(self, progress, cancel, cluster=cluster, **cluster_options)

    # -- geometry ----------------------------------------------------------------------------
    def _geometry_version(self) -> int | None:
        return geometry.geometry_version(self.store)

    @_serialised
    def backbone_features(self) -> np.ndarray:
        """(photos, dim) the extractor's vectors in the order of `photos()`, before any relearning."""
        return self._features

    @_serialised
    def features(self) -> np.ndarray:
        """The embedding proposals work in: the backbone's, or the relearned one when active."""
        version = self._geometry_version()
        return self._backdrop_corrected(self._base_features(version), version)

    def _base_features(self, version=None) -> np.ndarray:
        """features() before the opt-in backdrop correction (core/backdrop_correction.py)."""
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

    def _load_or_build_graph(self, progress=None, cancel=None) -> neighbours.Graph:
        feats = self.features()
        # The backbone's features are named by their vectors file, so the key does not read them.
        entry = self.store.vectors.file_entry(self.extractor_id) if self.extractor_id else None
        return geometry.load_or_build_graph(self.store.directory, self.extractor_id,
                                            [r.fingerprint for r in self._rows], feats,
                                            named_by=entry if feats is self._features else None,
                                            progress=progress, cancel=cancel)

    def _paths_to_indices(self, paths: Iterable[str]) -> list[int]:
        out = []
        for p in paths:
            p = Path(p).as_posix() if not isinstance(p, str) else p
            if p not in self._index:
                raise ProjectError(f"{p} is not a photo of this project (run scan first?)")
            out.append(self._index[p])
        return out

    def _state_arrays(self):
        """Kept for callers of the old name; see label_arrays."""
        return self.label_arrays()

    @property
    def _not_label(self) -> np.ndarray:
        return self.label_state.not_label()

    # -- proposals ---------------------------------------------------------------------------
    @_serialised
    def propose(self, limit: int = 20, settings: proposals.Settings | None = None, *,
                hold: int | None = None) -> list[Group]:
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
        return self._calibrated(proposal_queue.propose(self, limit, settings, hold))

    @_serialised
    def group(self, group_id: int) -> Group:
        row = self.store.proposal(group_id)
        if row is None:
            raise ProjectError(f"there is no group {group_id}")
        return self._calibrated([Group(row.id, row.members, row.trust, row.suggested_label, row.confidence,
                                       row.kind)])[0]

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
        return decisions.accept(self, group_id, label, drop)

    @_serialised
    def label(self, paths: Sequence[str], label: str) -> int:
        """Label photos directly (one or many); relabels photos that already carry a label."""
        return decisions.label(self, paths, label)

    @_serialised
    def set_aside(self, paths: Sequence[str]) -> int:
        """Mark photos as belonging to no class; they are never proposed again (undo brings them back)."""
        return decisions.set_aside(self, paths)

    @_serialised
    def clear(self, paths: Sequence[str]) -> int:
        """Remove labels (or set-aside marks) so the photos return to the pool."""
        return decisions.clear(self, paths)

    @_serialised
    def split(self, group_id: int) -> list[Group]:
        """Break a group into two coherent parts; they come back first in the next proposals."""
        return decisions.split(self, group_id)

    @_serialised
    def defer(self, group_id: int) -> int:
        """Leave a group for later: its photos come back after everything else has been proposed.
        Logged as a 'later' decision; undo brings the group back first. Returns the decision id."""
        return decisions.defer(self, group_id)

    @_serialised
    def undo(self) -> dict | None:
        """Reverse the newest decision not yet undone: a label change, a split (the whole group comes
        back first) or a 'later' (the group comes back first). Repeat to walk further back.
        Returns what was undone (`photos`: how many photos it gave back), or None when there is
        nothing left to undo."""
        return decisions.undo(self)

    # -- reading -----------------------------------------------------------------------------
    @_serialised
    def status(self) -> Status:
        if self._labels is None:                 # nothing read yet: let SQLite count (core/quick_status.py)
            return self._quick_status()
        ls = self.label_state
        by_label = ls.counts()
        labelled = int((ls.state == proposals.LABELLED).sum())
        aside = int((ls.state == proposals.SET_ASIDE).sum())
        return Status(photos=len(self._rows), labelled=labelled, set_aside=aside,
                      unlabelled=len(self._rows) - labelled - aside, by_label=dict(sorted(by_label.items())),
                      actions=self.store.decision_count(actions_only=True), skipped=self.store.skipped_count(),
                      relearned_version=self.store.active_relearn_version())

    @_serialised
    def photos(self) -> list[str]:
        return [r.path for r in self._rows]

    @_serialised
    def photo_info(self, path: str) -> dict:
        i = self._paths_to_indices([path])[0]
        r = self._rows[i]
        lr = self.label_state.row(r.fingerprint)
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
        state, label_of, names = self.label_arrays()
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
        known = self.label_state
        g = self.graph() if self._rows else None
        out = []
        for i, r in enumerate(self._rows):
            lr = known.row(r.fingerprint)
            if lr is None or lr.state != "labelled":
                continue
            burst = int(g.burst[i]) if g is not None and g.burst[i] >= 0 else None
            out.append(export.LabelledPhoto(r.path, lr.label, lr.how, lr.annotator, lr.time, r.width, r.height,
                                            burst))
        return out

    # -- relearning ---------------------------------------------------------------------------
    def relearn(self, progress: Progress | None = None, seconds: float | None = None,
                cancel: Cancel | None = None, adapt_embedding: bool = False, settings=None) -> dict:
        """Relearn from the decisions so far: refit the label classifier on the confirmed labels and
        the photos taken out of groups and, with `adapt_embedding`, also train the projection head
        that adapts the embedding. `settings`: a `core.relearning.Settings` to use instead (its
        `head` then decides). Stores a new version and makes it active. Never touches the
        decisions. Returns what it measured."""
        from core import relearning

        with self._mutex:
            inputs = relearning.Inputs.of(self)
        # The fit runs without the project's lock, so the other verbs go on meanwhile.
        result = relearning.relearn_project(inputs, progress=progress, seconds=seconds, cancel=cancel,
                                            settings=settings or relearning.Settings(head=adapt_embedding))
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
        state, label_of, names = self.label_arrays()
        known = self.label_state
        confirmed = np.array([getattr(known.row(r.fingerprint), "how", None) == mistakes.CONFIRMED
                              for r in self._rows], bool)
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
        return decisions.confirm(self, paths, label)

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
    # --- browse: every photo by state/label/subfolder/name, neighbours with labels, redo ---------
    # (core/browse.py, core/redo.py hold the work; these only delegate)
    @_serialised
    def browse(self, state: str | None = None, label: str | None = None, subfolder: str | None = None,
               name: str | None = None, offset: int = 0, limit: int | None = None):
        """Photos matching the filters, by path, a page at a time: `core.browse.Browsed` (total, photos
        as (path, state, label)). `state`: None, "unlabelled", "aside" or "labelled"."""
        from core import browse as browsing
        try:
            return browsing.browse(self.store, self.extractor_id, state=state, label=label, subfolder=subfolder,
                                   name=name, offset=offset, limit=limit)
        except browsing.BrowseError as exc:
            raise ProjectError(str(exc)) from None

    @_serialised
    def subfolders(self) -> list[tuple[str, int]]:
        """Folders holding photos directly, with how many ("" is the top level)."""
        from core import browse as browsing
        return browsing.subfolders(self.store, self.extractor_id)

    @_serialised
    def neighbours_labelled(self, path: str, k: int = 8) -> list[tuple[str, float, str, str | None]]:
        """`neighbours` with each photo's state and label: [(path, similarity, state, label)]."""
        from core import browse as browsing
        near = self.neighbours(path, k)
        fps = [self._rows[self._index[p]].fingerprint for p, _ in near]
        known = browsing.states_of(self.store, fps)
        return [(p, s, *known[fp]) for (p, s), fp in zip(near, fps)]

    @_serialised
    def redo(self) -> dict:
        """Apply again the decision the last undo reversed; only right after an undo (or a redo): any
        other decision ends the redo history. A new logged decision of the same kind (undoable again).
        Returns {decision, kind, photos}; ProjectError when there is nothing to redo."""
        from core import redo as redoing
        with self.store.transaction():
            u = redoing.pending_undo(self.store)
            if u is None:
                raise ProjectError("nothing to redo: redo only follows an undo, and a decision made since "
                                   "the undo ends what can be redone")
            d = redoing.original(self.store, u["undoes"])
            kind, gid = d["kind"], d["group_id"]
            if kind == "split":
                parts = self.split(gid)          # the cut is deterministic: the same parts come back
                with self.store.transaction() as db:   # the split just logged names the undo it reverses
                    dec = db.execute("SELECT MAX(id) FROM decisions").fetchone()[0]
                    db.execute("UPDATE decisions SET undoes = ? WHERE id = ?", (u["id"], dec))
                return {"decision": dec, "kind": kind, "photos": sum(len(p.members) for p in parts)}
            if kind == "later":
                members = [m for m in d["photos"] if m in self._index]
                previous = self.store.defer(self._rows[self._index[m]].fingerprint for m in members)
                dec = self.store.record_decision("later", self.annotator, members, {}, group_id=gid,
                                                 close_proposals=[gid] if gid is not None else [],
                                                 before=previous, undoes=u["id"])
                return {"decision": dec, "kind": kind, "photos": len(members)}
            # The undo found each photo as the undone decision left it: that is what comes back.
            changes = {fp: (LabelRow(fp, *row) if row else None) for fp, row in u["before"].items()}
            rejected = []
            if kind == "accept" and gid is not None and self.store.proposal(gid) is not None:
                # Members neither labelled by the accept nor carrying a label: the ones taken out.
                labels, kept = self.store.labels(), set(d["photos"])
                rejected = [self._rows[self._index[m]].fingerprint for m in self.store.proposal(gid).members
                            if m in self._index and m not in kept
                            and self._rows[self._index[m]].fingerprint not in labels]
            elif kind == "rename":
                # A rename carried the old name's "not this label" marks over to the new name.
                old = next((row[1] for row in d["before"].values() if row), None)
                rejected = [fp for fp, names in self.store.rejections().items() if old in names]
                if old is not None:
                    from core import label_rename
                    label_rename.follow_redo(self, old, d["label"])
            dec = self.store.record_decision(kind, self.annotator, d["photos"], changes, label=d["label"],
                                             group_id=gid,
                                             close_proposals=[gid] if kind == "accept" and gid is not None else [],
                                             rejected=rejected, undoes=u["id"])
            return {"decision": dec, "kind": kind, "photos": len(changes)}

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

    # --- calib: calibrated trust and suggestion confidence (core/calibration.py) ---
    @_serialised
    def calibration(self) -> "calibration.Calibrator":
        """The trust calibration: the prior, and the isotonic map learned from the accepted groups of
        this project (observed purity = share of the members not taken out)."""
        from core import calibration

        key = (self.store.decision_count(), self.store.active_relearn_version(), len(self._rows))
        cache = self.__dict__.setdefault("_calibration_cache", {})
        if cache.get("key") == key:
            return cache["calibrator"]
        if cache.get("graph") != key[1:]:        # features are measured on the graph in use
            cache.clear()
            cache.update(graph=key[1:], seen={}, log=[])
        seen, graph = cache["seen"], self.graph()
        ranks = None
        log = cache["log"]                     # the decisions read so far: only the new ones are read
        log += self.store.decisions(after=log[-1]["id"] if log else 0)
        rewritten = len(log) != key[0]
        if rewritten:                          # the log was rewritten under us: read it whole
            log[:] = self.store.decisions()
        decisions = log
        undone = {d["undoes"] for d in decisions if d["undoes"] is not None}
        # Observed groups are only ever appended unless a decision is undone: then every one is observed
        # again; otherwise the kept calibrator observes just the new decisions (not the whole log per call).
        fresh = rewritten or cache.get("undone") != undone or "calibrator" not in cache
        cal = calibration.Calibrator() if fresh else cache["calibrator"]
        for d in decisions if fresh else decisions[cache["observed"]:]:
            if d["kind"] != "accept" or d["group_id"] is None or d["id"] in undone:
                continue
            if d["id"] not in seen:                # each accepted group is measured once
                row = self.store.proposal(d["group_id"])
                idx = [self._index[m] for m in (row.members if row else ()) if m in self._index]
                if not idx:
                    seen[d["id"]] = None
                    continue
                if ranks is None:
                    ranks = calibration.entropy_ranks(graph)
                kept = len({self._rows[i].path for i in idx} & set(d["photos"])) / len(idx)
                sug = row.suggested_label is not None
                seen[d["id"]] = (calibration.group_features(graph, idx, sug, row.confidence, ranks), kept, len(idx),
                                 (kept if d["label"] == row.suggested_label else 0.0) if sug else None)
            if seen[d["id"]] is not None:
                cal.observe(*seen[d["id"]])
        cache.update(key=key, calibrator=cal, undone=undone, observed=len(decisions))
        return cal

    def _calibrated(self, groups: list[Proposal]) -> list[Proposal]:
        """The groups with trust = calibrated expected purity and confidence = calibrated expected share
        carrying the suggested label. The stored figures (and so the order) stay the engine's."""
        if not groups:
            return groups
        cal = self.calibration()
        items = [([self._index[m] for m in g.members if m in self._index] or [0], g.suggested_label is not None,
                  g.confidence) for g in groups]
        figs = cal.calibrate(self.graph(), items)
        return [dataclasses.replace(g, trust=round(t, 4), confidence=None if c is None else round(c, 4))
                for g, (t, c) in zip(groups, figs)]

    # --- dask: embedding a scan on a Dask cluster (core/cluster_scan.py) ---
    @staticmethod
    def _cluster_target(cluster):
        from core import cluster_scan

        try:
            return cluster_scan.parse_target(cluster)
        except ValueError as exc:
            raise ProjectError(str(exc)) from None

    def _embed_on_cluster(self, cluster, rows, extractor, progress, cancel, failed, retry, paths_of, options):
        """Embed `rows` on the cluster, storing each chunk; fills `failed` / `retry` as the in-process
        loop does. Returns (embedded, cancelled, one-line reason the cluster was lost or None)."""
        from core import cluster_scan

        try:
            run = cluster_scan.embed_rows(self.folder, rows, extractor, self.store, cluster, progress=progress,
                                          cancel=cancel, extractor_name=self.extractor_name, **options)
        except cluster_scan.ClusterError as exc:  # before any work was sent: nothing embedded
            return 0, True, str(exc)
        failed.update(run.failed)
        for fp, reason in run.retry.items():
            retry.update((path, reason) for path in paths_of[fp])
        return run.embedded, run.cancelled or run.lost is not None, run.lost

    # --- graphprog: whether the neighbour graph is ready (front ends build it with progress first) ---
    def graph_ready(self) -> bool:
        """True when the graph of the active geometry is in memory, so the verbs that need it (propose,
        review, mistakes, split, export) will not build it. Takes no lock (a build holds it): a cheap
        look for a front end deciding whether to run `prepare_graph` with progress and cancel first."""
        return self._graph is not None and self._graph_version == self.store.active_relearn_version()


    # --- reopen: the catalogue read when first needed, status counted by SQLite (core/quick_status.py) ---
    @property
    def _rows(self) -> list[PhotoRow]:
        """The catalogue: the photos embedded with the project's extractor, by path."""
        return (self._catalogue or self._read_catalogue())[0]

    @property
    def _index(self) -> dict[str, int]:
        """Row of each catalogued path."""
        return (self._catalogue or self._read_catalogue())[1]

    def _read_catalogue(self) -> tuple[list[PhotoRow], dict[str, int]]:
        with self._mutex:
            if self._catalogue is None:
                rows = self.store.catalogue(self.extractor_id) if self.extractor_id else []
                self._catalogue = (rows, {r.path: i for i, r in enumerate(rows)})
            return self._catalogue

    def _store_has_pending_changes(self) -> bool:
        """Whether this thread is inside a store transaction that already changed labels or decisions."""
        st = self.store
        with st._lock:
            return st._depth > 0 and bool(st._pending)

    def _quick_status(self) -> Status:
        from core import quick_status

        c = quick_status.counts(self.store, self.extractor_id)
        return Status(photos=c.photos, labelled=c.labelled, set_aside=c.set_aside,
                      unlabelled=c.photos - c.labelled - c.set_aside, by_label=c.by_label,
                      actions=self.store.decision_count(actions_only=True),
                      skipped=self.store.skipped_count(),
                      relearned_version=self.store.active_relearn_version())

    # --- order19: backdrop correction, opt-in (core/backdrop_correction.py) ---
    @_serialised
    def backdrop_correction(self, clusters: int | None = 4, progress: Progress | None = None,
                            cancel: Cancel | None = None) -> dict:
        """Switch the backdrop correction on (embed each photo's border view, group the views into
        `clusters` backdrops, remove each group's mean from the features proposals use) or off
        (clusters=None). Returns {photos, clusters, sizes, unreadable} ({} when switched off,
        {"cancelled": True} when cancelled: nothing changed)."""
        from core import backdrop_correction

        if clusters is None:
            self.store.set_setting(backdrop_correction.SETTING, None)
            out = {}
        else:
            try:
                out = backdrop_correction.compute(self, clusters, progress, cancel)
            except backdrop_correction.Cancelled:
                return dict(cancelled=True)
            except (ValueError, TypeError) as exc:
                raise ProjectError(str(exc)) from None
        # Proposals work in another space now: groups formed in the old one are formed again.
        self._graph = None
        self.__dict__.pop("_calibration_cache", None)
        stale = [row.id for row in self.store.open_proposals() if not row.pinned]
        if stale:
            self.store.update_open_proposals(stale, [])
        return out

    def _backdrop_corrected(self, feats: np.ndarray, version) -> np.ndarray:
        from core import backdrop_correction

        assign = backdrop_correction.assignment(self)
        if assign is None:
            return feats
        key = (version, len(self._rows), assign.tobytes())
        cache = self.__dict__.get("_backdrop_cache")
        if cache is None or cache[0] != key:
            cache = (key, backdrop_correction.apply(feats, assign))
            self._backdrop_cache = cache
        return cache[1]


def _check_extractor(obj) -> None:
    """Refuse, in one line, an extractor object that lacks part of the protocol."""
    from core.embedding import Extractor  # torch loads only when an object is handed in

    if not isinstance(obj, Extractor):
        missing = [m for m in ("id", "dim", "decode_side", "preprocess", "embed") if not hasattr(obj, m)]
        raise ProjectError(f"the extractor {type(obj).__name__} lacks {', '.join(missing)} (see the Extractor "
                           f"protocol in core/embedding.py)")
    if not isinstance(obj.id, str) or not obj.id.strip():
        raise ProjectError(f"the extractor {type(obj).__name__} needs a non-empty text id")


def _default_annotator() -> str:
    try:
        return getpass.getuser()
    except Exception:  # no user database entry (containers)
        return os.environ.get("USER", "annotator")
