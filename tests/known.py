"""An estimator whose training and validation errors are known exactly, for plumbing tests.

The data hold the answer in column 0 and a row id in column 1. The estimator
predicts answer + sqrt(error), with the training-error formula on rows it was
fitted on and the validation-error formula on the others, so every cell of a
grid has a value written down in advance:

    validation  v(c, r, m) = FLOOR + BIAS / c + SPREAD * c / (m (1 + r))
    training    t(c, r, m) = (FLOOR + BIAS / c) * m / (m + SPREAD * c / (1 + r))

for capacity c, regularisation r and m training rows: an inverse power law
in m with exponent 1 and asymptote FLOOR + BIAS / c, whose training curve
rises to the same plateau.
"""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, RegressorMixin

FLOOR, BIAS, SPREAD = 0.05, 0.4, 30.0


def validation_error(c: float, r: float, m: float) -> float:
    return FLOOR + BIAS / c + SPREAD * c / (m * (1.0 + r))


def training_error(c: float, r: float, m: float) -> float:
    return (FLOOR + BIAS / c) * m / (m + SPREAD * c / (1.0 + r))


def known_data(n: int, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """(X, y): the answer and a row id as features, the answer as target."""
    answer = np.random.default_rng(seed).normal(size=n).round(3)
    return np.column_stack([answer, np.arange(n, dtype=float)]), answer


class KnownCurve(RegressorMixin, BaseEstimator):
    """Predictions whose mean squared errors are training_error / validation_error exactly."""

    def __init__(self, capacity: float = 1.0, penalty: float = 0.0):
        self.capacity = capacity
        self.penalty = penalty

    def fit(self, X, y):
        X = np.asarray(X, dtype=float)
        self.ids_ = np.sort(X[:, 1])
        self.n_rows_ = X.shape[0]
        return self

    def predict(self, X):
        X = np.asarray(X, dtype=float)
        seen = np.isin(X[:, 1], self.ids_)
        c, r, m = float(self.capacity), float(self.penalty), float(self.n_rows_)
        offset = np.where(seen, np.sqrt(training_error(c, r, m)), np.sqrt(validation_error(c, r, m)))
        return X[:, 0] + offset
