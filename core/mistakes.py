"""Likely mislabels: labelled photos ranked by how likely their label is wrong, across all labels.

Two published scores, each in [0, 1] (higher: more likely wrong), and their mean:

- ``classifier`` (confident learning's out-of-sample disagreement): a multinomial logistic regression
  on the features predicts every labelled photo's label probabilities from folds it was not fitted
  on (cross-validated predicted probabilities); the score is 1 - p(given label), the photo's
  self-confidence turned round. Out of sample matters: fitted on itself, a wrong label is learnt.
- ``neighbours`` (kNN label agreement): the share of a photo's nearest labelled neighbours (up to
  `NEIGHBOURS`, in the neighbour graph's order) that carry another label.
- ``combined``: the mean of the two.

The suggested alternative is the other label the classifier finds most probable (``classifier``,
``combined``) or the other label most common among the neighbours (``neighbours``).

Which finds more planted errors is measured by ``python -m benchmarks.mislabel`` (5 % of the labels
flipped at random on Fashion-MNIST 2,000 and on the demo folder). The classifier finds clearly more
than the neighbours (precision@100 0.79-0.86 against 0.66-0.70 on Fashion-MNIST, seeds 0-2); the
default `METHOD` is the combined score, as good as the classifier on average and steadier from seed
to seed (figures in README, "Finding mistakes").

Probabilities are cross-validated with our own stratified folds rather than scikit-learn's
`cross_val_predict`, which refuses a label with fewer photos than folds; here such a label simply
has no photo in some training folds.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

METHODS = ("combined", "classifier", "neighbours")
METHOD = "combined"
NEIGHBOURS = 10          # labelled neighbours a photo's agreement is judged on
FOLDS = 5
# The classifier's settings, chosen with benchmarks.mislabel-style runs (5 % flipped, seeds 0 and 1) on
# Fashion-MNIST 2,000 and scikit-learn digits: strong regularisation (C 0.1 against 1 and 10) keeps a
# planted error from being learnt from its own fold's neighbours; 128 principal components did as well
# as 256 in half the time.
_C = 0.1
_DIMENSIONS = 128


CONFIRMED = "confirmed"   # the `how` of a label the annotator confirmed: it leaves the queue


@dataclass(frozen=True)
class Mistake:
    path: str
    label: str
    suggested: str | None   # the label the engine would give instead
    score: float            # 0..1, higher: more likely wrong


@dataclass(frozen=True)
class Suspect:
    index: int           # row of the arrays passed in
    label: int           # the label it carries (column number)
    suggested: int | None
    score: float


def out_of_sample_probabilities(x: np.ndarray, y: np.ndarray, n_labels: int, *, folds: int = FOLDS,
                                seed: int = 0) -> np.ndarray:
    """(len(x), n_labels) label probabilities, each row predicted by a classifier fitted without it.

    Folds are drawn per label (stratified), so every label is in every training fold that can hold it;
    a label with a single photo is absent from that photo's training fold, so its probability there is
    0 (nothing else looks like it). The features are reduced to their first `_DIMENSIONS` principal
    components (fitted on all rows: no labels are used, so nothing leaks) to keep five fits quick on
    tens of thousands of photos."""
    # Loaded before the thread limit is set: threadpoolctl limits only the BLAS libraries already
    # loaded, and scipy's own OpenBLAS comes in with these (unlimited, the first call took 30 s
    # instead of 2 on the busy 2-core machine).
    import scipy.linalg  # noqa: F401
    import scipy.optimize  # noqa: F401
    import sklearn.linear_model  # noqa: F401
    import sklearn.utils.extmath  # noqa: F401
    from threadpoolctl import threadpool_limits

    x = np.asarray(x, np.float64)
    y = np.asarray(y, np.int64)
    n = len(x)
    prob = np.zeros((n, n_labels))
    if n == 0:
        return prob
    # One BLAS thread: on a shared or busy machine, threads fighting over two cores made the fits
    # 10-70 times slower (measured while other work ran), and the window's other threads need a core.
    with threadpool_limits(limits=1):
        return _cross_validated(_reduce(x, seed), y, n_labels, folds, seed)


def _cross_validated(z: np.ndarray, y: np.ndarray, n_labels: int, folds: int, seed: int) -> np.ndarray:
    from sklearn.linear_model import LogisticRegression

    n = len(z)
    prob = np.zeros((n, n_labels))
    rng = np.random.default_rng(seed)
    fold = np.empty(n, np.int64)
    start = 0
    for lab in np.unique(y):     # round-robin within each label, from a shuffled start
        members = rng.permutation(np.nonzero(y == lab)[0])
        fold[members] = (start + np.arange(len(members))) % folds
        start += len(members)
    for f in range(folds):
        test, train = fold == f, fold != f
        if not test.any():
            continue
        present = np.unique(y[train])
        if len(present) < 2:     # one label to learn from: it is all the fold can say
            if len(present) == 1:
                prob[np.ix_(test, present)] = 1.0
            continue
        clf = LogisticRegression(C=_C, max_iter=300, class_weight="balanced")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # a fit stopped at max_iter still ranks well
            clf.fit(z[train], y[train])
        prob[np.ix_(test, clf.classes_)] = clf.predict_proba(z[test])
    return prob


def _reduce(x: np.ndarray, seed: int) -> np.ndarray:
    """Centred features on their leading principal components (randomised SVD), scaled so that each
    dimension has unit variance on average."""
    from sklearn.utils.extmath import randomized_svd

    x = x - x.mean(0, keepdims=True)
    if x.shape[1] > _DIMENSIONS and len(x) > _DIMENSIONS:
        _, _, vt = randomized_svd(x, _DIMENSIONS, random_state=seed)
        x = x @ vt.T
    scale = np.sqrt((x ** 2).sum(1).mean()) or 1.0
    return x / scale * np.sqrt(x.shape[1])


def classifier_scores(prob: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(1 - p(given label), the most probable other label) from out-of-sample probabilities."""
    rows = np.arange(len(y))
    score = 1.0 - prob[rows, y]
    other = prob.copy()
    other[rows, y] = -np.inf
    return score, other.argmax(1)


def neighbour_scores(idx: np.ndarray, label_of: np.ndarray, rows: np.ndarray,
                     k: int = NEIGHBOURS) -> tuple[np.ndarray, np.ndarray]:
    """For each photo in `rows`: the share of its first k labelled neighbours (graph order, -1 padding
    and unlabelled photos passed over) carrying another label, and the most common of those labels
    (-1 when all agree). A photo with no labelled neighbour scores 0: there is no evidence."""
    n_labels = int(label_of.max()) + 1 if len(label_of) and label_of.max() >= 0 else 0
    score = np.zeros(len(rows))
    other = np.full(len(rows), -1, np.int64)
    for out, i in enumerate(rows):
        near = idx[i]
        near = near[near >= 0]
        labs = label_of[near]
        labs = labs[labs >= 0][:k]
        if len(labs) == 0:
            continue
        wrong = labs[labs != label_of[i]]
        score[out] = len(wrong) / len(labs)
        if len(wrong):
            other[out] = np.bincount(wrong, minlength=n_labels).argmax()
    return score, other


def rank(features: np.ndarray, label_of: np.ndarray, neighbour_idx: np.ndarray, *, method: str = METHOD,
         keep: np.ndarray | None = None, seed: int = 0) -> list[Suspect]:
    """Labelled photos (label_of >= 0) ranked most likely wrong first, ties by row.

    `features`: one row per photo (all photos, labelled or not); `neighbour_idx`: (photos, k) nearest
    photos, most similar first, -1 padding; `keep`: a mask of the photos that may be listed (all
    labelled photos are still used as evidence: a confirmed photo still teaches the classifier)."""
    if method not in METHODS:
        raise ValueError(f"unknown method {method!r}; one of {', '.join(METHODS)}")
    label_of = np.asarray(label_of, np.int64)
    rows = np.nonzero(label_of >= 0)[0]
    y = label_of[rows]
    if len(np.unique(y)) < 2:
        return []                # one label: nothing to disagree with
    n_labels = int(label_of.max()) + 1
    score = np.zeros(len(rows))
    parts = []
    if method in ("classifier", "combined"):
        prob = out_of_sample_probabilities(features[rows], y, n_labels, seed=seed)
        parts.append(classifier_scores(prob, y))
    if method in ("neighbours", "combined"):
        parts.append(neighbour_scores(neighbour_idx, label_of, rows))
    for s, _ in parts:
        score += s / len(parts)
    suggested = parts[0][1]
    if method == "combined":     # the neighbours' label where the classifier has none to offer
        suggested = np.where(suggested >= 0, suggested, parts[1][1])
    order = np.lexsort((rows, -score))
    allowed = np.ones(len(label_of), bool) if keep is None else np.asarray(keep, bool)
    return [Suspect(int(rows[o]), int(y[o]), int(suggested[o]) if suggested[o] >= 0 else None,
                    float(round(score[o], 6)))
            for o in order if allowed[rows[o]]]


def precision_at(ranked: list[int], wrong: set[int], top: int = 100) -> float:
    """Share of the first `top` listed rows that are in `wrong` (the benchmark's and the tests' figure)."""
    head = ranked[:top]
    return sum(i in wrong for i in head) / top if top else 0.0
