"""Fixtures shared by the test modules."""

from __future__ import annotations

import pytest

from tests.known import KnownCurve, known_data

KNOWN_CAPACITIES = [1.0, 2.0, 4.0, 8.0]
KNOWN_PENALTIES = [0.0, 1.0]


@pytest.fixture(scope="session")
def known_grid():
    """A grid of the estimator with known errors, measured in memory (no run folder)."""
    import gridplan
    X, y = known_data(1200)
    return gridplan.measure(KnownCurve(), X, y, capacity=("capacity", KNOWN_CAPACITIES),
                            regularization=("penalty", KNOWN_PENALTIES), train_sizes=6,
                            cv=4, repeats=2, n_jobs=1, seed=5)
