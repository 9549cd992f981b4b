"""Geometry: the space proposals work in, and the neighbour graph over it with its cache.

- `geometry_version(store)`: the relearned version whose head adapts the embedding, or None when
  proposals work in the backbone's own vectors.
- `load_or_build_graph(...)`: the neighbour graph (core/neighbours.py) from its cache file in the store
  folder when that was built from exactly these features with exactly these settings; otherwise built
  and cached (written atomically, older caches removed). A cache that fails to load for any reason is
  rebuilt; a read-only store keeps the graph in memory only.
"""
from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Sequence

import numpy as np

from core import neighbours
from core.atomic import write_with

# What the neighbour graph is built with; all of it is part of the graph cache's key.
GRAPH_SETTINGS = dict(k=64, temperature=0.1, burst_threshold=0.97, centre=True)
GRAPH_FORMAT = 3          # 3: no features inside (the graph is handed them), their mean kept
GRAPH_FIELDS = ("sims", "idx", "entropy", "mutual", "burst")


def geometry_version(store) -> int | None:
    """The active relearned version when it adapts the embedding; None when proposals work in the
    backbone's geometry (no version, or a version with the label classifier only)."""
    version = store.active_relearn_version()
    if version is None:
        return None
    from core import relearning

    return version if relearning.has_head(store.relearn_state(version)) else None


def cache_key(extractor_id: str | None, fingerprints: Sequence[str], feats: np.ndarray,
              named_by: Sequence | None = None) -> str:
    """Covers the settings (the graph's and every setting of the neighbour search), the photos and
    their order, and the features themselves (the extractor's output, or the relearned head's when
    it adapts them). `named_by`: what names the features without reading them (the backbone's
    vectors file: its token and committed rows; a file is only appended to until a compaction gives
    it a new token); without it the features are hashed."""
    key = hashlib.sha1(json.dumps(dict(
        format=GRAPH_FORMAT, settings=GRAPH_SETTINGS, extractor=extractor_id, shape=feats.shape,
        neighbours=neighbours.settings_key()), sort_keys=True).encode())
    for fp in fingerprints:
        key.update(fp.encode())
    if named_by is not None:
        key.update(json.dumps(["vectors", *named_by]).encode())
    else:
        key.update(np.ascontiguousarray(feats, np.float32).tobytes())
    return key.hexdigest()[:16]


def load_or_build_graph(store_dir: Path, extractor_id: str | None, fingerprints: Sequence[str],
                        feats: np.ndarray, *, named_by: Sequence | None = None, progress=None,
                        cancel=None) -> neighbours.Graph:
    """The graph holds no copy of the features: it is handed `feats` (`Graph.rows`). A build reports
    progress and stops with `neighbours.Cancelled` when `cancel()` says so (nothing cached)."""
    cache = Path(store_dir) / f"graph-{cache_key(extractor_id, fingerprints, feats, named_by)}.npz"
    centre = GRAPH_SETTINGS.get("centre", True)
    if cache.exists():
        try:
            with np.load(cache, allow_pickle=False) as z:
                g = neighbours.Graph(**{k: z[k] for k in GRAPH_FIELDS})
                mean = z["mean"] if centre else None
            check_graph(g, len(fingerprints))
            return g.attach(neighbours.Source(feats, centre=centre, mean=mean))
        except Exception:  # truncated (BadZipFile, EOFError), pickled, garbage, wrong shapes...
            try:
                cache.unlink(missing_ok=True)
            except OSError:
                pass  # a read-only store keeps its damaged cache; the graph is rebuilt in memory
    g = neighbours.build_graph(feats, **GRAPH_SETTINGS, progress=progress, cancel=cancel)
    mean = g.source.mean if g.source.mean is not None else np.zeros(0, np.float32)
    try:
        write_with(cache, lambda tmp: np.savez(tmp, mean=mean, **{k: getattr(g, k) for k in GRAPH_FIELDS}), ".npz")
        for old in Path(store_dir).glob("graph-*.npz"):
            if old != cache:
                old.unlink(missing_ok=True)
    except OSError:  # a read-only store or a full disk: the graph is kept in memory only
        pass
    return g


def check_graph(g: neighbours.Graph, n: int) -> None:
    """Raise ValueError unless `g` has the shapes and indices of a graph over n photos."""
    k = g.idx.shape[1] if g.idx.ndim == 2 else -1
    ok = (g.idx.ndim == 2 and g.idx.shape == (n, k) and g.sims.shape == (n, k)
          and g.mutual.shape == (n, k) and g.entropy.shape == (n,) and g.burst.shape == (n,)
          and (n == 0 or (g.idx.min() >= -1 and g.idx.max() < n)))
    if not ok:
        raise ValueError("graph cache does not fit the catalogue")
