"""A real `Project` over cached feature vectors: the store gets one catalogue row and one embedding per
vector (paths only; no photo file is read or decoded), so benchmarks time and replay the product's own
engine code — every verb, the store, the label state, the graph cache — without the backbone."""
from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np

from core.project import Project
from core.store import PhotoRow


def build_project(folder: Path, x: np.ndarray, classes, annotator: str = "bench") -> tuple[Project, dict[str, str]]:
    """Open a project in `folder` (created) holding one photo per row of `x`; returns it with the truth
    {path: class name} from `classes` (one per row)."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    rows = [PhotoRow(f"photo_{i:07d}.png", hashlib.sha1(str(i).encode()).hexdigest(), 1000 + i, 0, 28, 28)
            for i in range(len(x))]
    ext = "cached-features:%dx%d" % x.shape
    p = Project.open(folder, annotator=annotator)
    p.store.set_setting("extractor_id", ext)
    p.store.replace_catalogue(rows, {})
    for s in range(0, len(rows), 20000):
        p.store.put_embeddings(ext, [r.fingerprint for r in rows[s:s + 20000]], x[s:s + 20000])
    p.reload()
    return p, {r.path: str(c) for r, c in zip(rows, classes)}
