"""Plumbing on an estimator whose errors are known exactly (tests/known.py), measured in memory.

Every number below is written down in advance by the formulas in
tests/known.py, so these tests check that settings, sizes, folds, curves and
advice are wired to each other, quickly and without noise.
"""

from __future__ import annotations

import pytest

from tests.conftest import KNOWN_CAPACITIES, KNOWN_PENALTIES
from tests.known import BIAS, FLOOR, SPREAD, training_error, validation_error


def test_every_cell_holds_its_known_errors(known_grid):
    cells = known_grid.cells
    assert len(cells) == len(KNOWN_CAPACITIES) * len(KNOWN_PENALTIES) * 6 * 4 * 2
    assert (cells["status"] == "ok").all()
    for row in cells.itertuples():
        c, r, m = float(row.capacity), float(row.regularization), float(row.train_size)
        assert c == KNOWN_CAPACITIES[row.capacity_index] and r == KNOWN_PENALTIES[row.regularization_index]
        assert row.validation_error == pytest.approx(validation_error(c, r, m), rel=1e-9)
        assert row.train_error == pytest.approx(training_error(c, r, m), rel=1e-9)


def test_sizes_climb_to_the_training_fold(known_grid):
    sizes = sorted(known_grid.cells["train_size"].unique())
    assert len(sizes) == 6 and sizes == sorted(set(sizes))
    assert sizes[-1] == 1200 * 3 // 4                 # 4 folds: the whole training fold
    per_unit = known_grid.cells.groupby(["repeat", "fold"]).size()
    assert len(per_unit) == 8 and (per_unit == len(KNOWN_CAPACITIES) * len(KNOWN_PENALTIES) * 6).all()


def test_curves_recover_the_known_power_law(known_grid):
    # Inverse power law e(m) = a + b m^(-c) (Cortes et al. 1994): here a = FLOOR + BIAS / c,
    # b = SPREAD c / (1 + r), exponent 1; samples to reach e*: m* = b / (e* - a).
    fits = known_grid._fits()
    assert len(fits) == len(KNOWN_CAPACITIES) * len(KNOWN_PENALTIES)
    for (ci, ri), fit in fits.items():
        c, r = KNOWN_CAPACITIES[ci], KNOWN_PENALTIES[ri]
        plateau, amplitude = FLOOR + BIAS / c, SPREAD * c / (1.0 + r)
        largest = float(fit.sizes[-1])
        assert fit.asymptote == pytest.approx(plateau, rel=1e-6)
        assert float(fit.predict(4 * largest)) == pytest.approx(validation_error(c, r, 4 * largest), rel=1e-6)
        target = plateau + 0.5 * (validation_error(c, r, largest) - plateau)
        assert fit.samples_needed(target, 0.9).point == pytest.approx(amplitude / (target - plateau), rel=1e-3)


def test_advice_lands_where_the_known_curve_meets_the_target(known_grid):
    advice = known_grid.advise(target=0.2)
    assert advice.reachable and advice.plan
    end = advice.plan[-1].to
    c, r = float(end.capacity), float(end.regularization)
    assert end.interval[1] <= 0.2
    assert end.predicted_error == pytest.approx(validation_error(c, r, end.size), rel=1e-3)
    # it could not have met the target where it started: every measured cell is above it
    assert known_grid.cells.groupby(["capacity", "regularization", "train_size"])[
        "validation_error"].mean().min() > 0.2
    assert FLOOR + BIAS / c < 0.2 < validation_error(c, r, float(known_grid.cells["train_size"].max()))
