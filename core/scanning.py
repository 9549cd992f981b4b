"""Scanning: bring the project's catalogue up to date with its folder, and embed what is new.

`scan(project)` lists the folder (core/catalogue.py: fingerprints, skips remembered across scans),
embeds the photos no vector is stored for, in chunks of EMBED_CHUNK committed one by one (a crash loses
at most one chunk; the next scan goes on from there), and replaces the catalogue in one transaction.
A file that is not a readable photo is remembered as skipped; a failure that may pass (I/O, memory, the
network) is reported for this scan only and tried again by the next one.
"""
from __future__ import annotations

import time
from dataclasses import dataclass

from core.errors import ProjectError
from core.store import PhotoRow

EMBED_CHUNK = 1024          # photos embedded and committed per step, so a crash loses at most this
SKIPPED_FORMAT = 2          # remembered skips: final failures only, reasons without absolute paths


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


def scan(project, progress=None, cancel=None, cluster=None, **cluster_options) -> ScanReport:
    """Scan `project`'s folder (a core.project.Project); see the module's docstring. With `cluster`
    the embedding runs on Dask (core/cluster_scan.py, through Project's "dask" block)."""
    from core import catalogue    # here, not at import: reading a project's status never loads PIL

    if cluster is not None:
        cluster = project._cluster_target(cluster)
    t0 = time.perf_counter()
    previous = {r.path: r for r in project.store.photos()}
    # Skips remembered before reasons were checked for being final (and named no path) are
    # looked at once more.
    remembered = project.store.skipped() if project.store.get_setting("skipped_format") == SKIPPED_FORMAT else {}
    try:
        cat = catalogue.scan_folder(project.folder, previous, remembered, progress=progress, cancel=cancel)
    except OSError as exc:  # the folder itself cannot be listed (gone, no permission, I/O error)
        raise ProjectError(f"cannot read the folder {project.folder}: {exc.strerror or exc}") from exc
    failed: dict[str, str] = {}
    retry = dict(cat.retry)
    embedded = 0
    cancelled = cat.cancelled or bool(cancel and cancel())
    todo: dict[str, PhotoRow] = {}
    paths_of: dict[str, list[str]] = {}
    if not cancelled:  # a cancelled scan does not wait for the network to load
        extractor = project.extractor()
        stored = project.store.get_setting("extractor_id")
        if stored is not None and stored.rpartition(":")[0] != extractor.id.rpartition(":")[0]:
            # Another network or pooling (not just another precision): the relearned classifier and
            # adapted embedding were fitted on the old vectors, so the plain embedding takes over.
            project.store.activate_relearn_version(None)
        project.store.set_setting("extractor_id", extractor.id)
        done_fps = project.store.embedded_fingerprints(extractor.id)
        for r in cat.photos:
            paths_of.setdefault(r.fingerprint, []).append(r.path)
            if r.fingerprint not in done_fps:
                todo.setdefault(r.fingerprint, r)
    todo_rows = list(todo.values())
    lost = None
    if todo_rows and cluster is not None:
        embedded, cancelled, lost = project._embed_on_cluster(cluster, todo_rows, extractor, progress, cancel,
                                                              failed, retry, paths_of, cluster_options)
    elif todo_rows:
        from core.embedding import embed_files

        for start in range(0, len(todo_rows), EMBED_CHUNK):
            chunk = todo_rows[start:start + EMBED_CHUNK]
            # Progress counts across the whole scan (every earlier chunk was embedded or unreadable).
            res = embed_files([project.folder / r.path for r in chunk], extractor, progress=progress,
                              cancel=cancel, counted=(embedded, start - embedded, len(todo_rows)))
            project.store.put_embeddings(extractor.id, [chunk[i].fingerprint for i in res.ok], res.vectors)
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
    with project._mutex:
        project.store.replace_catalogue(photos, skipped)
        project.store.set_setting("skipped_format", SKIPPED_FORMAT)
        project._load_catalogue()
        project._compact_vectors()
    shown = [(p, v[2]) for p, v in skipped.items()]
    shown += [(p, f"{reason} (tried again at the next scan)") for p, reason in retry.items()]
    if lost:  # the cluster went away: what finished is stored, the next scan carries on
        raise ProjectError(lost)
    ready = {r.path for r in photos}  # new and changed count photos, not files later left out
    return ScanReport(photos=len(project._rows), new=sum(p in ready for p in cat.new),
                      changed=sum(p in ready for p in cat.changed),
                      removed=len(cat.removed), embedded=embedded, skipped=sorted(shown),
                      cancelled=cancelled, seconds=time.perf_counter() - t0)
