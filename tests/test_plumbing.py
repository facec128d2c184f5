"""Plumbing on an estimator whose errors are known exactly (tests/known.py), measured in memory.

Every number below is written down in advance by the formulas in
tests/known.py, so these tests check that settings, sizes, folds, curves and
advice are wired to each other, quickly and without noise.
"""

from __future__ import annotations

import pytest

from gridplan.showing.text import render_advice
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


def test_rows_needed_past_the_checked_horizon_are_told_as_beyond(known_grid):
    # Closed form m* = b / (e* - a) of the known power law: a target that capacity 8
    # without penalty reaches only at 20x the largest measured size.
    from gridplan.deciding.curves import CHECKED_HORIZON
    from gridplan.deciding.gridfit import curves_summary
    from gridplan.showing.text import render_summary
    fits = known_grid._fits()
    largest = int(known_grid.cells["train_size"].max())
    c = KNOWN_CAPACITIES[-1]
    plateau, amplitude = FLOOR + BIAS / c, SPREAD * c
    target = plateau + amplitude / (20 * largest)
    summary = curves_summary(fits, target=target).to_dict()
    index, row = next((i, s) for i, s in enumerate(summary["settings"])
                      if s["capacity"] == "8" and s["regularization"] == "0")
    assert row["horizon_size"] == int(CHECKED_HORIZON * largest)
    assert row["samples_needed_point"] == pytest.approx(20 * largest, rel=1e-3)
    line = render_summary(summary).splitlines()[3 + index]     # title, header, rule, rows
    assert f"beyond {row['horizon_size']:,}" in line
    assert "20x the largest measured size; forecasts are checked only up to 8x" in line
    assert f"about {row['samples_needed_point']:,}" not in line


def test_a_plan_past_the_checked_horizon_says_to_measure_first(known_grid):
    # The cheapest plan ends far past the data, and the headline says so.
    from gridplan.deciding.curves import CHECKED_HORIZON
    largest = int(known_grid.cells["train_size"].max())
    advice = known_grid.advise(target=0.168)      # met at 16x the data (the bands' shape error)
    assert advice.reachable and advice.horizon_size == int(CHECKED_HORIZON * largest)
    end = advice.plan[-1].to
    assert end.size > advice.horizon_size
    assert advice.headline.endswith(
        f"; but {end.size:,} rows are {end.size / largest:.0f}x the largest measured size and "
        f"forecasts are checked only to 8x, so label at most about "
        f"{advice.horizon_size - largest:,} more rows first and run again.")
    near = known_grid.advise(target=0.2)            # a plan inside the horizon: no such words
    assert near.plan[-1].to.size <= near.horizon_size and "checked only" not in near.headline


def test_a_plateau_held_at_the_floor_edge_is_told_as_a_bound(known_grid):
    # The known plateau of capacity 8 is FLOOR + BIAS / 8 = 0.1; bounding the asymptote at
    # 0.12 holds it there, and the table then gives a bound, not a band of width zero.
    from gridplan.deciding.curves import fit_setting
    from gridplan.deciding.gridfit import curves_summary
    from gridplan.showing.text import render_summary
    cells = known_grid.cells
    one = cells[(cells.capacity_index == 3) & (cells.regularization_index == 0)]
    table = one.pivot_table(index="train_size", columns=["repeat", "fold"], values="validation_error")
    for bound, held in ((0.0, False), (0.12, True)):
        fit = fit_setting(table.index.to_numpy(float), table.to_numpy(), n_boot=20,
                          asymptote_min=bound)
        assert fit.asymptote == pytest.approx(0.12 if held else FLOOR + BIAS / 8, rel=1e-6)
        summary = curves_summary({(0, 0): fit}, target=0.2).to_dict()
        assert summary["settings"][0]["plateau_at_floor"] is held
        line = render_summary(summary).splitlines()[3]
        assert (">= 0.120 (floor edge)" in line and "plateau not determined" in line) is held


def test_each_curve_carries_its_own_check_and_a_rough_plan_says_so(known_grid, monkeypatch):
    # The known curves are exact power laws, so refits on smaller sizes forecast the larger
    # ones exactly (Cortes et al. 1994 form, exponent 1): every own check is about zero.
    from gridplan.deciding import advisor, calibration
    fits = known_grid._fits()
    errors = [fit.own_check_error for fit in fits.values()]
    assert all(e is not None and e < 1e-4 for e in errors), errors
    calm = known_grid.advise(target=0.2)
    assert calm.plan_end_check_error is not None and calm.plan_end_check_error < 1e-4
    assert "rough forecast" not in calm.headline
    assert "forecast its larger ones 0% off" in render_advice(calm.to_dict())
    monkeypatch.setattr(advisor, "OWN_CHECK_CAUTION", -1.0)      # every curve counts as rough
    monkeypatch.setattr(calibration, "OWN_CHECK_CAUTION", -1.0)
    rough = known_grid.advise(target=0.2)
    assert (f"; a rough forecast: refitted on its smaller sizes, this setting's curve forecast "
            f"its larger ones {rough.plan_end_check_error:.0%} off") in rough.headline
    assert ": a rough forecast" in render_advice(rough.to_dict())
