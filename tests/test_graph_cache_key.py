"""Issue 18: the neighbour graph is cached under a key of every setting its build uses. Changing any one
of them (neighbours count, temperature, the exact/approximate switch, the extractor, the relearned
version that adapts the features, the photo set) builds the graph anew; reopening with nothing changed
loads it from the cache file without building. The project is a real store filled with clustered
synthetic vectors (benchmarks/cached_project.py: no photo decoded), so every step is the product's code.
The check on what was rebuilt is outside the cache: a fresh `neighbours.build_graph` on the same
features and settings must give the same neighbours."""
import numpy as np
import pytest

from benchmarks.cached_project import build_project
from core import geometry, neighbours
from core.project import Project

N, D = 360, 24


def _clustered(n: int = N, d: int = D, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    centres = rng.normal(size=(6, d)).astype(np.float32)
    classes = np.arange(n) % 6
    x = centres[classes] + 0.35 * rng.normal(size=(n, d)).astype(np.float32)
    return (x / np.linalg.norm(x, axis=1, keepdims=True)).astype(np.float32), classes


class Builds:
    """Counts the graph builds the project asks for (loading a cache file is not one)."""

    def __init__(self, monkeypatch):
        self.count = 0
        real = neighbours.build_graph

        def counted(*a, **kw):
            self.count += 1
            return real(*a, **kw)

        monkeypatch.setattr(geometry.neighbours, "build_graph", counted)


def _graph_files(folder):
    return sorted(p.name for p in (folder / ".kinfold").glob("graph-*.npz"))


def _prepared(folder) -> tuple[neighbours.Graph, list[str]]:
    with Project.open(folder, annotator="t") as p:
        g = p.prepare_graph()
        return (neighbours.Graph(g.sims.copy(), g.idx.copy(), g.entropy.copy(), g.mutual.copy(), g.burst.copy()),
                _graph_files(folder))


def _reopen_loads(folder, builds: Builds, graph: neighbours.Graph) -> None:
    """Reopening with nothing changed loads the cached graph: no build, the same arrays."""
    before = builds.count
    again, _ = _prepared(folder)
    assert builds.count == before
    np.testing.assert_array_equal(again.idx, graph.idx)
    np.testing.assert_array_equal(again.entropy, graph.entropy)


@pytest.fixture
def project_folder(tmp_path):
    x, classes = _clustered()
    p, _ = build_project(tmp_path / "photos", x, classes)
    p.close()
    return tmp_path / "photos", x


def test_every_setting_is_in_the_key(project_folder, monkeypatch):
    folder, x = project_folder
    builds = Builds(monkeypatch)

    g0, files0 = _prepared(folder)
    assert builds.count == 1 and len(files0) == 1
    _reopen_loads(folder, builds, g0)
    # Outside the cache: the same build on the same features gives the same neighbours.
    ref = neighbours.build_graph(x, **geometry.GRAPH_SETTINGS)
    np.testing.assert_array_equal(ref.idx, g0.idx)
    builds.count -= 1

    changes = [
        ("neighbours count", lambda: monkeypatch.setitem(geometry.GRAPH_SETTINGS, "k", 20),
         lambda g: g.idx.shape[1] == 20),
        ("temperature", lambda: monkeypatch.setitem(geometry.GRAPH_SETTINGS, "temperature", 0.2),
         lambda g: not np.allclose(g.entropy, g0.entropy)),
        # Below the collection's size the approximate search (lists) takes over.
        ("exact/approximate switch", lambda: monkeypatch.setattr(neighbours, "EXACT_LIMIT", 100), lambda g: True),
        ("a setting of the approximate search", lambda: monkeypatch.setattr(neighbours, "PROBES", 3), lambda g: True),
    ]
    seen = set(files0)
    for what, change, check in changes:
        change()
        before = builds.count
        g, files = _prepared(folder)
        assert builds.count == before + 1, f"changing the {what} did not build the graph again"
        assert len(files) == 1 and files[0] not in seen, what     # a new key; the old file removed
        seen.add(files[0])
        assert check(g), what
        _reopen_loads(folder, builds, g)

    # The approximate build is what ran after the switch: its neighbours differ from the exact ones
    # somewhere (PROBES 3 of ~76 lists), yet mostly agree (recall measured against exact search).
    approx, _ = _prepared(folder)
    exact = neighbours.build_graph(x, **geometry.GRAPH_SETTINGS, exact_limit=10 ** 6)
    recall = np.mean([len(set(a[:10]) & set(b[:10])) / 10 for a, b in zip(approx.idx, exact.idx)])
    assert 0.3 < recall < 1.0


def test_extractor_and_photo_set_are_in_the_key(project_folder, monkeypatch):
    folder, x = project_folder
    builds = Builds(monkeypatch)
    g0, files0 = _prepared(folder)
    assert builds.count == 1

    # Another extractor's vectors of the same photos (the same numbers even): a new key.
    with Project.open(folder, annotator="t") as p:
        fps = [r.fingerprint for r in p._rows]
        p.store.set_setting("extractor_id", "another-extractor:1")
        p.store.put_embeddings("another-extractor:1", fps, x)
    g1, files1 = _prepared(folder)
    assert builds.count == 2 and files1 != files0
    np.testing.assert_array_equal(g1.idx, g0.idx)        # same vectors, same graph: only the key moved
    _reopen_loads(folder, builds, g1)

    # One photo fewer: a new key, and a graph over the photos left.
    with Project.open(folder, annotator="t") as p:
        rows = list(p._rows[:-1])
        p.store.replace_catalogue(rows, {})
    g2, files2 = _prepared(folder)
    assert builds.count == 3 and files2 != files1 and g2.n == N - 1
    _reopen_loads(folder, builds, g2)


def test_relearned_version_is_in_the_key(project_folder, monkeypatch):
    """A relearned version that adapts the features builds its own graph; restoring the backbone
    (no version) builds the backbone's again (the older file was replaced), then loads it."""
    from core import relearning

    if not hasattr(relearning, "relearn_project"):
        pytest.skip("relearning not offered")
    folder, x = project_folder
    builds = Builds(monkeypatch)
    g0, files0 = _prepared(folder)
    with Project.open(folder, annotator="t") as p:
        paths = p.photos()
        _, classes = _clustered()
        for c in range(3):
            p.label([paths[i] for i in range(len(paths)) if classes[i] == c][:20], f"class {c}")
        result = p.relearn(seconds=5, settings=relearning.Settings(head=True, dim=16, supervised_steps=20))
        assert result.get("version") is not None, result
        assert geometry.geometry_version(p.store) is not None
    before = builds.count
    g1, files1 = _prepared(folder)
    assert builds.count == before + 1 and files1 != files0
    _reopen_loads(folder, builds, g1)
    with Project.open(folder, annotator="t") as p:
        p.restore(None)
    g2, files2 = _prepared(folder)
    assert builds.count == before + 2 and files2 == files0
    np.testing.assert_array_equal(g2.idx, g0.idx)
    _reopen_loads(folder, builds, g2)
