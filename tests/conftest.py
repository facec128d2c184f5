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


@pytest.fixture
def forking(monkeypatch):
    """Fork even where earlier tests left idle pool threads behind; records each pool made.

    A fresh gridplan process has no other Python thread, so there it forks anyway; in
    a long test session dask and joblib leave idle threads that would make it run
    the parts in-process, and a side-by-side test would then compare one core with itself.
    """
    import multiprocessing
    import sys

    from gridplan.common import forked
    if sys.platform == "darwin" or "fork" not in multiprocessing.get_all_start_methods():
        pytest.skip("fork is not offered here")
    made: list[bool] = []
    original = forked._fork_workers
    monkeypatch.setattr(forked, "can_fork", lambda: True)

    def recording(count: int, tasks: int):
        started = original(count, tasks)
        made.append(started is not None)
        return started
    monkeypatch.setattr(forked, "_fork_workers", recording)
    return made
