"""The data path at scale: the vectors file (core/vectors.py) and approximate neighbours
(core/neighbours.py). Speed and memory targets live in benchmarks/scale.py, not here."""
import sqlite3

import faiss
import numpy as np
import pytest
from scipy.special import softmax
from scipy.stats import entropy as scipy_entropy

from core import neighbours, vectors
from core.project import Project
from core.store import _MIGRATIONS, STORE_FILE, PhotoRow, Store, _split_sql


def _vecs(n, d=16, seed=0):
    x = np.random.default_rng(seed).standard_normal((n, d)).astype(np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def test_vectors_file_round_trip(tmp_path):
    st = Store(tmp_path / "s")
    a, b = _vecs(50), _vecs(30, 8, seed=1)
    fps = [f"fp{i}" for i in range(50)]
    st.put_embeddings("ext-a", fps[:20], a[:20])
    st.put_embeddings("ext-a", fps[20:], a[20:])           # appended after the committed rows
    st.put_embeddings("ext-b", fps[:30], b)
    st.close()
    st = Store(tmp_path / "s")                              # read back by a fresh store
    assert st.embedded_fingerprints("ext-a") == set(fps)
    m = st.embeddings("ext-a", fps)
    assert isinstance(m, np.memmap) or isinstance(m.base, np.memmap)   # the file itself, no copy
    np.testing.assert_array_equal(m, a)
    np.testing.assert_array_equal(st.embeddings("ext-a", fps[::-1]), a[::-1])
    np.testing.assert_array_equal(st.embeddings("ext-b", fps[:30]), b)
    files = sorted(p.name for p in (tmp_path / "s").glob("vectors-*.f32"))
    assert len(files) == 2
    # No BLOBs: the rows live in the files.
    assert st._one("SELECT count(*) FROM embeddings")[0] == 0


def test_compaction_keeps_only_the_catalogue_in_order(tmp_path):
    st = Store(tmp_path / "s")
    a = _vecs(40)
    fps = [f"fp{i}" for i in range(40)]
    st.put_embeddings("old", fps, a)
    st.put_embeddings("new", fps, a * 0.5)
    st.put_embeddings("new", fps[:5], a[:5])                # re-embedded: 5 dead rows in the file
    v = st.vectors
    token, dim, rows = v.file_entry("new")
    assert rows == 45
    keep = fps[30:] + fps[:10]                              # photos 10..29 removed, order changed
    assert v.compact("new", keep)
    assert v.extractors() == ["new"]                        # the old extractor's file is gone
    names = [p.name for p in (tmp_path / "s").glob("vectors-*.f32")]
    new_token, _, new_rows = v.file_entry("new")
    assert names == [vectors.file_name(new_token)] and new_token != token
    assert new_rows == 20 and (tmp_path / "s" / names[0]).stat().st_size == 20 * 16 * 4
    want = np.concatenate([a[30:] * 0.5, a[:5], a[5:10] * 0.5])
    np.testing.assert_array_equal(st.embeddings("new", keep), want)
    assert not v.compact("new", keep)                       # nothing left to do
    # A file no table names (a crash during compaction) is deleted at the next opening.
    stray = tmp_path / "s" / vectors.file_name("deadbeef")
    stray.write_bytes(b"\0" * 64)
    assert v.remove_stale_files() == 1 and not stray.exists()


def test_uncommitted_tail_rows_are_written_over(tmp_path):
    st = Store(tmp_path / "s")
    a = _vecs(10)
    st.put_embeddings("e", [f"f{i}" for i in range(5)], a[:5])
    token, dim, rows = st.vectors.file_entry("e")
    path = tmp_path / "s" / vectors.file_name(token)
    with open(path, "ab") as fh:                            # a put that crashed before its commit
        fh.write(np.ones((3, dim), np.float32).tobytes())
    st.put_embeddings("e", [f"f{i}" for i in range(5, 10)], a[5:])
    np.testing.assert_array_equal(st.embeddings("e", [f"f{i}" for i in range(10)]), a)


def _schema_2_store(directory, photos, ext, vecs):
    directory.mkdir(parents=True)
    db = sqlite3.connect(directory / STORE_FILE, isolation_level=None)
    db.execute("PRAGMA journal_mode=WAL")
    for script in _MIGRATIONS[:2]:
        for stmt in _split_sql(script):
            db.execute(stmt)
    db.execute("PRAGMA user_version=2")
    db.executemany("INSERT INTO photos VALUES (?, ?, ?, ?, ?, ?)",
                   [(p.path, p.fingerprint, p.size, p.mtime_ns, p.width, p.height) for p in photos])
    db.executemany("INSERT INTO embeddings VALUES (?, ?, ?)",
                   [(p.fingerprint, ext, v.tobytes()) for p, v in zip(photos, vecs)])
    db.execute("INSERT INTO settings VALUES ('extractor_id', ?)", (f'"{ext}"',))
    db.close()


def test_old_project_is_upgraded_and_opens_lazily(tmp_path, monkeypatch):
    folder = tmp_path / "photos"
    folder.mkdir()
    photos = [PhotoRow(f"p{i:03d}.png", f"fp{i}", 10, 1, 28, 28) for i in range(60)]
    vecs = _vecs(60, 32)
    _schema_2_store(folder / ".kinfold", photos, "ext:test", vecs)
    with Project.open(folder) as p:
        assert p.store.schema_version() == 3
        assert p.store._one("SELECT count(*) FROM embeddings")[0] == 0     # moved out of the BLOBs
        assert len(list((folder / ".kinfold").glob("vectors-*.f32"))) == 1
        np.testing.assert_array_equal(p.features(), vecs)
    # Opening and status read no vectors.
    calls = []
    real = vectors.Vectors.matrix
    monkeypatch.setattr(vectors.Vectors, "matrix", lambda self, *a: calls.append(a) or real(self, *a))
    with Project.open(folder) as p:
        assert p.status().photos == 60 and p.status().unlabelled == 60
        assert calls == [] and p._features_map is None
        g = p.graph()                                       # now they are read, once
        assert len(calls) == 1
        # The graph holds no copy of the features: it is handed the project's.
        assert g.source.features is p._features
        np.testing.assert_allclose(g.rows([3]), neighbours.prepare(vecs)[[3]], atol=1e-6)


@pytest.fixture(scope="module")
def fashion_pixels():
    # Fashion-MNIST test split (Debian dataset-fashion-mnist): real photos, raw pixels as features.
    from benchmarks.fashion import load_fashion_mnist

    imgs, labels = load_fashion_mnist(6000)
    return imgs.reshape(len(imgs), -1).astype(np.float32) / 255.0, labels


def test_approximate_search_recall_and_entropy_error(fashion_pixels):
    x, _ = fashion_pixels
    src = neighbours.Source(x)
    # Force the approximate path (it starts at 20,000 photos in the product).
    sims, idx, ent = neighbours.search(src, 10, 0.1, exact_limit=1000)
    q = np.random.default_rng(3).choice(len(x), 300, replace=False)
    prepared = neighbours.prepare(x)
    # Reference: faiss IndexFlatIP, exact inner-product search over the prepared rows.
    flat = faiss.IndexFlatIP(prepared.shape[1])
    flat.add(prepared)
    _, ref = flat.search(prepared[q], 11)
    recall = np.mean([len(set(idx[i]) & (set(r) - {i})) / 10 for i, r in zip(q, ref)])
    assert recall >= 0.95, recall
    # Reference: scipy's entropy of the softmax over all other photos.
    z = (prepared[q] @ prepared.T).astype(np.float64) / 0.1
    z[np.arange(len(q)), q] = -np.inf
    exact = scipy_entropy(softmax(z, axis=1), axis=1)
    err = np.abs(ent[q] - exact)
    assert err.mean() <= 0.05, err.mean()
    # And the streaming exact reference the benchmark uses agrees with both.
    s2, i2, e2 = neighbours.exact_rows(src, q, 10, 0.1, chunk=2048)
    np.testing.assert_allclose(e2, exact, atol=1e-4)
    assert np.mean([len(set(a) & (set(r) - {i})) / 10 for i, a, r in zip(q, i2, ref)]) > 0.999


def test_graph_build_reports_progress_and_cancels(fashion_pixels):
    x, _ = fashion_pixels
    seen = []
    with pytest.raises(neighbours.Cancelled):
        neighbours.build_graph(x, k=10, exact_limit=1000, progress=lambda d, t, m: seen.append((d, t)),
                               cancel=lambda: len(seen) >= 3)
    assert len(seen) == 3 and all(t == len(x) for _, t in seen)
    seen.clear()
    with pytest.raises(neighbours.Cancelled):               # the exact path too
        neighbours.build_graph(x[:3000], k=10, progress=lambda d, t, m: seen.append(d), cancel=lambda: bool(seen))
    assert len(seen) == 1


def test_features_handed_over_are_left_unchanged(fashion_pixels):
    x, _ = fashion_pixels
    x = x[:3000].copy()
    before = x.copy()
    for centre in (True, False):
        neighbours.build_graph(x, k=5, exact_limit=500, centre=centre)
    np.testing.assert_array_equal(x, before)
