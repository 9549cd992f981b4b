"""faiss neighbours and neighbourhood entropy against reference libraries."""
import numpy as np
import pytest
from scipy.special import softmax
from scipy.stats import entropy as scipy_entropy
from sklearn.datasets import load_digits
from sklearn.neighbors import NearestNeighbors

from core.neighbours import build_graph, bursts, knn, mutual_mask, neighbourhood_entropy, prepare


@pytest.fixture(scope="module")
def digits():
    # scikit-learn's bundled digits (1,797 images, 8 x 8): real data, small enough to compare exactly.
    x, y = load_digits(return_X_y=True)
    return prepare(x.astype(np.float32)), y


def test_knn_matches_scikit_learn_brute_cosine(digits):
    x, _ = digits
    sims, idx = knn(x, 10)
    # Reference: scikit-learn NearestNeighbors(algorithm="brute", metric="cosine"); its first hit is self.
    nn = NearestNeighbors(n_neighbors=11, algorithm="brute", metric="cosine").fit(x)
    dist, ref = nn.kneighbors(x)
    np.testing.assert_allclose(sims, 1 - dist[:, 1:], atol=1e-5)
    # Indices agree except where two neighbours are tied in similarity.
    agree = (idx == ref[:, 1:]).mean()
    assert agree > 0.999, agree


def test_entropy_matches_scipy_with_self_left_out(digits):
    x, _ = digits
    ent = neighbourhood_entropy(x, temperature=0.1)
    z = (x @ x.T).astype(np.float64) / 0.1
    np.fill_diagonal(z, -np.inf)                       # self term left out
    # Reference: scipy.stats.entropy of the softmax distribution over all other photos.
    ref = scipy_entropy(softmax(z, axis=1), axis=1)
    np.testing.assert_allclose(ent, ref, rtol=1e-4, atol=1e-4)


def test_self_term_matters(digits):
    # With the self term included an isolated photo looks most certain; left out, it does not.
    x, _ = digits
    z = (x @ x.T).astype(np.float64) / 0.1
    with_self = scipy_entropy(softmax(z, axis=1), axis=1)
    without = neighbourhood_entropy(x, 0.1)
    isolated = np.argsort((x @ x.T - 2 * np.eye(len(x))).max(1))[:20]   # weakest nearest neighbour
    assert with_self[isolated].mean() < np.median(with_self)
    assert without[isolated].mean() > np.median(without)


def test_approximate_entropy_error_is_small(digits):
    x, _ = digits
    exact = neighbourhood_entropy(x, 0.1)
    approx = neighbourhood_entropy(x, 0.1, exact_limit=10, knn_result=knn(x, 64), tail_sample=1024)
    # The tail estimate is a sample; on this set its error stays a small share of the entropy range.
    assert np.abs(approx - exact).mean() < 0.02 * (exact.max() - exact.min())
    assert np.corrcoef(approx, exact)[0, 1] > 0.99


def test_mutual_mask_and_bursts():
    idx = np.array([[1, 2], [0, 2], [0, 1], [0, 1]])
    m = mutual_mask(idx, 2)
    assert m.tolist() == [[True, True], [True, True], [True, True], [False, False]]
    sims = np.array([[0.99, 0.5], [0.99, 0.4], [0.5, 0.4], [0.2, 0.1]])
    assert bursts(sims, idx, 0.95).tolist() == [0, 0, -1, -1]


def _mutual_by_definition(idx, k):
    rows = [set(int(j) for j in r[:k] if j >= 0) for r in idx]
    return [[bool(j >= 0 and i in rows[j]) for j in r[:k]] for i, r in enumerate(idx)]


def test_mutual_mask_ignores_padded_neighbours():
    # Photo 2 lists 1 but 1 does not list 2; photo 2's padding (-1) once encoded as the pair (1, 2)
    # (2 * 3 - 1 == 1 * 3 + 2) and made 1 look mutual with 2.
    idx = np.array([[1, 2], [0, -1], [1, -1]])
    assert mutual_mask(idx, 2).tolist() == [[True, False], [True, False], [False, False]]
    # Random padded lists against the definition.
    rng = np.random.default_rng(0)
    for n in (2, 3, 5, 9):
        for _ in range(50):
            k = int(rng.integers(1, n + 1))
            idx = np.full((n, k), -1)
            for i in range(n):
                others = rng.permutation([j for j in range(n) if j != i])[: int(rng.integers(0, min(k, n - 1) + 1))]
                idx[i, : len(others)] = others
            assert mutual_mask(idx, k).tolist() == _mutual_by_definition(idx, k)


def test_graph_on_digits_entropy_tracks_purity(digits):
    # The neighbourhood-entropy rule (a rule of the field): low entropy, class-consistent neighbours.
    x, y = digits
    g = build_graph(x, k=10, centre=False)
    purity = (y[g.idx] == y[:, None]).mean(1)
    order = np.argsort(g.entropy)
    dec = len(x) // 10
    assert purity[order[:dec]].mean() > purity[order[-dec:]].mean()
