"""Groups that follow the object, not the backdrop: an opt-in correction of the space proposals use.

Photos of one collection are often shot on a few backdrops (a drawer liner, a table, a cloth); ImageNet
features carry the backdrop as much as the object, so neighbours share backdrops and groups mix
objects. The correction estimates each photo's backdrop from the photo alone and removes it:

1. each photo's **border view** (core.object_views.border_view: the central 60 % of each side painted
   over with the border's median colour) is embedded by the project's own extractor (one more
   backbone pass per photo, like a scan's);
2. the border views are grouped by spherical k-means (`clusters`, default 4: on the demo 4 and 8 gave
   the same yield@80, 4 the higher yield@100, and 4 lost least on Fashion-MNIST; 16 was worse on both);
3. from every photo's feature the mean feature of its backdrop group is subtracted (the overall mean
   added back), so what photos on one backdrop share no longer pulls them together.

Nothing about the true backdrop is used. The assignment is stored in the project (setting
``backdrop_correction``: the number of groups and a group per photo fingerprint), applied by
`Project.features()` to whatever space is active (backbone or relearned), and switched off again by
`Project.backdrop_correction(None)`. Photos scanned after it was computed form one more group of
their own until it is computed again.

Once 50 photos carry labels, `compute` also says what they think of it (`label_check`): the share of
each labelled photo's 10 nearest labelled photos that carry its label, without and with the
correction, so a user can tell whether their collection is one it helps.

Measured by `python -m benchmarks.backdrop` (README, trust section): on the demo folder (five drawer
liners) yield@80 4.20 -> 5.65 and yield@100 2.97 -> 5.48; on Fashion-MNIST (no backdrop: the border
view then sees the garment's outline) yield@80 3.66 -> 3.31. So it is opt-in, for photos shot on a few
backdrops, never the default.
"""
from __future__ import annotations

from typing import Callable

import numpy as np

from core import object_views

SETTING = "backdrop_correction"
DEFAULT_CLUSTERS = 4
BATCH = 32
MIN_CHECK_PHOTOS = 50      # labelled photos needed before the labels are asked whether it helps
CHECK_MARGIN = 0.005       # a smaller change in label agreement is called no clear difference

Progress = Callable[[int, int, str], None]
Cancel = Callable[[], bool]


class Cancelled(Exception):
    pass


def border_features(paths, extractor, progress: Progress | None = None, cancel: Cancel | None = None
                    ) -> tuple[np.ndarray, np.ndarray]:
    """(features of each photo's border view, True where the photo could be read)."""
    import torch

    from core.embedding import l2_normalise
    from core.images import load_rgb

    n = len(paths)
    out = np.zeros((n, extractor.dim), np.float32)
    ok = np.zeros(n, bool)
    batch: list = []
    where: list[int] = []

    def flush():
        if batch:
            out[where] = extractor.embed(torch.stack(batch))
            batch.clear()
            where.clear()

    for i, path in enumerate(paths):
        if cancel is not None and cancel():
            raise Cancelled
        try:
            img = load_rgb(path, min_side=extractor.decode_side)
            batch.append(extractor.preprocess(object_views.border_view(img)))
            where.append(i)
            ok[i] = True
        except Exception:               # an unreadable photo keeps no backdrop group (see `assignment`)
            pass
        if len(batch) == BATCH:
            flush()
        if progress is not None:
            progress(i + 1, n, "backdrops")
    flush()
    out[ok] = l2_normalise(out[ok])
    return out, ok


def compute(project, clusters: int = DEFAULT_CLUSTERS, progress: Progress | None = None,
            cancel: Cancel | None = None) -> dict:
    """Embed the border views of `project`'s photos, group them and store the assignment. Returns
    {photos, clusters, sizes, unreadable}."""
    if int(clusters) < 2:
        raise ValueError(f"clusters must be at least 2, got {clusters}")
    rows = project._rows
    if len(rows) < 2 * int(clusters):
        raise ValueError(f"{len(rows)} photos are too few for {clusters} backdrop groups")
    feats, ok = border_features([project.folder / r.path for r in rows], project.extractor(), progress, cancel)
    if ok.sum() < 2 * int(clusters):
        raise ValueError(f"only {int(ok.sum())} photos could be read: too few for {clusters} backdrop groups")
    assign = np.full(len(rows), -1, np.int64)
    assign[ok] = object_views.backdrop_clusters(feats[ok], int(clusters))
    base = project._base_features(project._geometry_version())
    check = label_check(base, apply(base, assign), project.label_arrays()[1])
    project.store.set_setting(SETTING, dict(clusters=int(clusters),
                                            assign={r.fingerprint: int(a) for r, a in zip(rows, assign)}))
    sizes = np.bincount(assign[ok]).tolist()
    out = dict(photos=len(rows), clusters=int(clusters), sizes=sizes, unreadable=int((~ok).sum()))
    if check is not None:
        out["check"] = check
    return out


def label_agreement(feats: np.ndarray, labels: np.ndarray, k: int = 10, sample: int = 2000, seed: int = 0) -> float:
    """Share of a labelled photo's `k` nearest labelled photos (cosine, centred features) that carry its
    label; at most `sample` photos asked."""
    from core.neighbours import prepare

    z = prepare(feats)
    rng = np.random.default_rng(seed)
    ask = np.arange(len(z)) if len(z) <= sample else np.sort(rng.choice(len(z), sample, replace=False))
    s = z[ask] @ z.T
    s[np.arange(len(ask)), ask] = -np.inf
    k = min(k, len(z) - 1)
    nb = np.argpartition(-s, k - 1, axis=1)[:, :k]
    return float((labels[nb] == labels[ask][:, None]).mean())


def label_check(before: np.ndarray, after: np.ndarray, label_of: np.ndarray,
                min_photos: int = MIN_CHECK_PHOTOS) -> dict | None:
    """What the annotator's own labels say about the correction: the label agreement of the labelled
    photos' nearest labelled photos without and with it (None below `min_photos` labelled photos or
    with fewer than two labels). On the demo after 15 accepted groups it rose 0.943 -> 0.968, on
    Fashion-MNIST (where the correction loses yield) it fell 0.991 -> 0.981 (benchmarks/backdrop.py)."""
    lab = np.flatnonzero(label_of >= 0)
    if len(lab) < min_photos or len(np.unique(label_of[lab])) < 2:
        return None
    y = label_of[lab]
    b, a = label_agreement(before[lab], y), label_agreement(after[lab], y)
    verdict = "helps" if a > b + CHECK_MARGIN else "hurts" if a < b - CHECK_MARGIN else "no clear difference"
    return dict(labelled=int(len(lab)), before=round(b, 4), after=round(a, 4), verdict=verdict)


def assignment(project) -> np.ndarray | None:
    """The backdrop group of each photo (in `photos()` order), -1 for photos without one; None when
    the correction is off."""
    s = project.store.get_setting(SETTING)
    if not s:
        return None
    a = s["assign"]
    return np.array([a.get(r.fingerprint, -1) for r in project._rows], np.int64)


def apply(feats: np.ndarray, assign: np.ndarray | None) -> np.ndarray:
    """`feats` with each backdrop group's mean removed (photos without a group form one more)."""
    if assign is None or len(feats) == 0:
        return feats
    return object_views.remove_backdrop_clusters(feats, None, assign=assign)
