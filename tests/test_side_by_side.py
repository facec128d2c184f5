"""Work spread over cores gives the same answers as the plain loop, bit for bit."""

from __future__ import annotations

import os
import warnings

import numpy as np
import pytest

from gridplan.common import forked
from gridplan.deciding import curves
from gridplan.deciding.batchfit import fit_batch
from gridplan.deciding.gridfit import fit_grid
from gridplan.deciding.shapes import FAMILIES, fit_family, start_points

needs_fork = pytest.mark.skipif(not forked.can_fork(), reason="fork is not offered here")


def test_parts_come_back_in_order_and_errors_are_raised():
    parts = [lambda k=k: (k, os.getpid()) for k in range(5)]
    results = forked.run_parts(parts, 2)
    assert [k for k, _ in results] == list(range(5))
    assert forked.run_parts(parts, 1) == [(k, os.getpid()) for k in range(5)]
    if forked.can_fork():
        assert {pid for _, pid in results} != {os.getpid()}     # really drawn elsewhere

    def bad():
        raise ValueError("part 2 failed")
    with pytest.raises(ValueError, match="part 2 failed"):
        forked.run_parts([parts[0], bad], 2)


@needs_fork
def test_a_dead_child_costs_nothing_the_parts_run_here():
    parent = os.getpid()

    def dies_in_a_child() -> int:
        if os.getpid() != parent:
            os._exit(3)
        return 7
    assert forked.run_parts([dies_in_a_child, dies_in_a_child], 2) == [7, 7]


def test_all_starts_in_one_batch_equal_one_batch_per_start():
    # The starts of a family are stacked into one batch; each row's fit must be
    # exactly what it was alone (the plain loop over starts is the reference).
    rng = np.random.default_rng(3)
    sizes = np.array([40, 80, 160, 320, 640, 1280.0])
    x = np.tile(sizes / sizes[-1], (30, 1))
    y = 0.1 + 2.0 * sizes[None, :] ** -0.5 * (1 + 0.05 * rng.standard_normal((30, 6)))
    w = np.full_like(y, 20.0)
    for name in ("pow3", "pow4", "mmf4", "wbl4"):
        fam = FAMILIES[name]
        starts = start_points(name, x, y, w)
        theta, cost = fit_family(fam, x, y, w, starts)
        lower = np.tile(np.array(fam.lower, dtype=float), (len(x), 1))
        best_theta, best_cost = np.full_like(theta, np.nan), np.full(len(x), np.inf)
        for start in starts:
            t, c = fit_batch(fam.evaluate, fam.jacobian, x, y, w, start, lower,
                             np.array(fam.upper, dtype=float))
            better = np.all(np.isfinite(t), axis=1) & (c < best_cost)
            best_theta[better], best_cost[better] = t[better], c[better]
        np.testing.assert_array_equal(theta, best_theta)
        np.testing.assert_array_equal(cost, best_cost)


def test_a_grid_fitted_on_two_cores_is_the_grid_fitted_on_one(known_grid, monkeypatch, forking):
    monkeypatch.setattr(curves, "MIN_PROBLEMS_PER_PART", 3)   # split even this small grid
    one = fit_grid(known_grid.cells, n_boot=30, jobs=1)
    assert forking == []
    two = fit_grid(known_grid.cells, n_boot=30, jobs=2)
    assert forking and all(forking)                          # really fitted in children
    assert sorted(one) == sorted(two) and len(one) == 8
    for key, fit in one.items():
        np.testing.assert_array_equal(fit.theta, two[key].theta)
        np.testing.assert_array_equal(fit.boot_theta, two[key].boot_theta)
        assert fit.family == two[key].family
    assert one.calibration == two.calibration and one.calibration.checks > 0
    assert one.floor == two.floor


def test_per_curve_bootstrap_counts_match_separate_fits(known_grid):
    # One call with 40 resamples for some curves and 12 for others equals two calls.
    from gridplan.deciding.gridfit import _settings_data
    problems = [curves.make_problem(d.sizes, d.validation, d.training, d.info, d.n_repeats,
                                    d.seed) for d in _settings_data(known_grid.cells, 0)]
    families = ("pow3", "pow4")
    mixed = curves.fit_problems(problems, families, [40, 12] * 4)
    alone = (curves.fit_problems(problems[0::2], families, 40),
             curves.fit_problems(problems[1::2], families, 12))
    for k, fit in enumerate(mixed):
        reference = alone[k % 2][k // 2]
        assert fit.boot_theta.shape[0] == reference.boot_theta.shape[0] <= (40, 12)[k % 2]
        np.testing.assert_array_equal(fit.boot_theta, reference.boot_theta)
        np.testing.assert_array_equal(fit.theta, reference.theta)


def test_the_short_row_median_is_numpys():
    # Reference: numpy.nanmedian along the last axis.
    rng = np.random.default_rng(0)
    for shape in [(5,), (7, 8), (100, 9), (3, 4, 6), (50, 1), (4, 0)]:
        values = rng.random(shape)
        values[rng.random(shape) < 0.3] = np.nan
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            expected = np.nanmedian(values, axis=-1)
        np.testing.assert_array_equal(curves._nanmedian_last(values), expected)


def test_with_another_thread_running_the_parts_run_here():
    # A forked child inherits the locks other threads hold, not the threads: never fork then.
    import threading
    release = threading.Event()
    helper = threading.Thread(target=release.wait)
    helper.start()
    try:
        assert not forked.can_fork()
        assert {pid for pid in forked.run_parts([os.getpid, os.getpid], 2)} == {os.getpid()}
    finally:
        release.set()
        helper.join()


@needs_fork
def test_a_registered_thread_is_paused_for_the_fork_and_resumed():
    # The CLI's terminal spinner: stopped (and joined) while the children are made.
    import threading
    log = []
    state = {}

    def start():
        state["stop"] = threading.Event()
        state["thread"] = threading.Thread(target=state["stop"].wait)
        state["thread"].start()
        log.append("resume")

    def stop():
        state["stop"].set()
        state["thread"].join()
        log.append("pause")

    foreign = threading.active_count() > 1     # threads earlier tests left (dask, joblib pools)
    start()
    log.clear()
    try:
        with forked.paused_while_forking(stop, start):
            pids = forked.run_parts([os.getpid, os.getpid], 2)
        # forked although our thread was running, unless someone else's still runs
        assert (os.getpid() in pids) == foreign
        assert log == ["pause", "resume"] and state["thread"].is_alive()
    finally:
        stop()


def test_when_no_process_can_be_made_the_parts_run_here(monkeypatch, forking):
    # os.fork failing (process limit, memory) is not the user's problem: same answers, here.
    def no_more_processes():
        raise BlockingIOError(11, "Resource temporarily unavailable")
    monkeypatch.setattr(os, "fork", no_more_processes)
    assert forked.run_parts([os.getpid, os.getpid], 2) == [os.getpid(), os.getpid()]
    assert forking == [False]
