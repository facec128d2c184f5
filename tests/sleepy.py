"""A test estimator that can hang: used to check the per-fit time limit."""

from __future__ import annotations

import time

import numpy as np
from sklearn.base import BaseEstimator, RegressorMixin


class SleepyRegressor(RegressorMixin, BaseEstimator):
    """Predicts the mean; `nap` seconds of sleep per fit (a stand-in for a hung fit)."""

    def __init__(self, nap: float = 0.0):
        self.nap = nap

    def fit(self, X, y):
        time.sleep(self.nap)
        self.mean_ = float(np.mean(y))
        return self

    def predict(self, X):
        return np.full(len(X), self.mean_)
