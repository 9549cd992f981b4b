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
GRAPH_FORMAT = 2
GRAPH_FIELDS = ("x", "sims", "idx", "entropy", "mutual", "burst")


def geometry_version(store) -> int | None:
    """The active relearned version when it adapts the embedding; None when proposals work in the
    backbone's geometry (no version, or a version with the label classifier only)."""
    version = store.active_relearn_version()
    if version is None:
        return None
    from core import relearning

    return version if relearning.has_head(store.relearn_state(version)) else None


def cache_key(extractor_id: str | None, fingerprints: Sequence[str], feats: np.ndarray) -> str:
    """Covers the settings, the limits that switch methods, the photos and their order, and the
    features themselves (the extractor's output, or the relearned head's when it adapts them)."""
    key = hashlib.sha1(json.dumps(dict(
        format=GRAPH_FORMAT, settings=GRAPH_SETTINGS, extractor=extractor_id, shape=feats.shape,
        limits=[neighbours.EXACT_KNN_LIMIT, neighbours.EXACT_ENTROPY_LIMIT, neighbours.BURST_NEIGHBOURS]),
        sort_keys=True).encode())
    for fp in fingerprints:
        key.update(fp.encode())
    key.update(np.ascontiguousarray(feats, np.float32).tobytes())
    return key.hexdigest()[:16]


def load_or_build_graph(store_dir: Path, extractor_id: str | None, fingerprints: Sequence[str],
                        feats: np.ndarray) -> neighbours.Graph:
    cache = Path(store_dir) / f"graph-{cache_key(extractor_id, fingerprints, feats)}.npz"
    if cache.exists():
        try:
            with np.load(cache, allow_pickle=False) as z:
                g = neighbours.Graph(**{k: z[k] for k in GRAPH_FIELDS})
            check_graph(g, len(fingerprints))
            return g
        except Exception:  # truncated (BadZipFile, EOFError), pickled, garbage, wrong shapes...
            try:
                cache.unlink(missing_ok=True)
            except OSError:
                pass  # a read-only store keeps its damaged cache; the graph is rebuilt in memory
    g = neighbours.build_graph(feats, **GRAPH_SETTINGS)
    try:
        write_with(cache, lambda tmp: np.savez(tmp, **{k: getattr(g, k) for k in GRAPH_FIELDS}), ".npz")
        for old in Path(store_dir).glob("graph-*.npz"):
            if old != cache:
                old.unlink(missing_ok=True)
    except OSError:  # a read-only store or a full disk: the graph is kept in memory only
        pass
    return g


def check_graph(g: neighbours.Graph, n: int) -> None:
    """Raise ValueError unless `g` has the shapes and indices of a graph over n photos."""
    k = g.idx.shape[1] if g.idx.ndim == 2 else -1
    ok = (g.x.ndim == 2 and len(g.x) == n and g.idx.shape == (n, k) and g.sims.shape == (n, k)
          and g.mutual.shape == (n, k) and g.entropy.shape == (n,) and g.burst.shape == (n,)
          and (n == 0 or (g.idx.min() >= -1 and g.idx.max() < n)))
    if not ok:
        raise ValueError("graph cache does not fit the catalogue")
