"""`LabelClassifier`: the label classifier a relearn fits, as a scikit-learn estimator.

Parameters are set in `__init__` and only stored there; `fit(...)` returns the estimator; what it
learned ends in `_` (`coef_`, `intercept_`, `mean_`, `classes_`); `get_params`/`set_params`/`clone`
come from scikit-learn's `BaseEstimator`. The fit itself is `core.relearning.fit_classifier`
(scikit-learn's L2-penalised multinomial logistic regression objective, balanced class weights, and
"not this label" answers as complementary labels), and `to_classifier()` gives the stored form
(`core.relearning.Classifier`) a relearned version keeps.
"""
from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, ClassifierMixin


class LabelClassifier(ClassifierMixin, BaseEstimator):
    def __init__(self, c: float = 1.0, max_iter: int = 200, balanced: bool = True, rejection_weight: float = 3.0,
                 hidden: int = 0, hidden_steps: int = 80, whiten: int = 0):
        self.c = c
        self.max_iter = max_iter
        self.balanced = balanced
        self.rejection_weight = rejection_weight
        self.hidden = hidden
        self.hidden_steps = hidden_steps
        self.whiten = whiten

    def fit(self, features: np.ndarray, state: np.ndarray, label_of: np.ndarray, names: list[str],
            not_label: np.ndarray | None = None, cancel=None) -> "LabelClassifier":
        """Fit to the labelled photos (`state` LABELLED, `label_of` indexing `names`); `not_label`:
        (n, len(names)) "not this label" answers. Raises ValueError with fewer than two labels in
        use, InterruptedError when `cancel()` returned True."""
        from core import relearning

        state, label_of = np.asarray(state), np.asarray(label_of)
        if len(np.unique(label_of[state == relearning.LABELLED])) < 2:
            raise ValueError("the label classifier needs photos under at least two labels")
        clf = relearning.fit_classifier(features, state, label_of, names, c=self.c, max_iter=self.max_iter,
                                        balanced=self.balanced, not_label=not_label,
                                        rejection_weight=self.rejection_weight, cancel=cancel,
                                        hidden=self.hidden, hidden_steps=self.hidden_steps, whiten=self.whiten)
        if clf is None:
            raise InterruptedError("the label classifier's fit was cancelled")
        self.coef_, self.intercept_, self.mean_ = clf.weight, clf.bias, clf.mean
        # The optional parts: the MLP on top, the whitening underneath (None when not fitted).
        self.optional_ = {key: getattr(clf, key) for key in relearning._OPTIONAL}
        self.classes_ = np.array(clf.labels, dtype=object)
        return self

    def to_classifier(self):
        """The stored form of the fit (core.relearning.Classifier)."""
        from core import relearning

        return relearning.Classifier(self.coef_, self.intercept_, self.mean_, tuple(self.classes_),
                                     **getattr(self, "optional_", {}))

    def predict_proba(self, features: np.ndarray, names: list[str] | None = None) -> np.ndarray:
        """(n, classes) probabilities in the order of `classes_`, or of `names` when given (NaN for
        names the fit did not know)."""
        return self.to_classifier().probabilities(features, list(self.classes_) if names is None else names)

    def predict(self, features: np.ndarray) -> np.ndarray:
        return self.classes_[self.predict_proba(features).argmax(1)]
