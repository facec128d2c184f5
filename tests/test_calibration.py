"""Calibration on the run's own extrapolations: recovery of a known model, honest bands, the corpus."""

from __future__ import annotations

import importlib.util
import sys
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from gridplan.deciding.calibration import fit_calibration
from gridplan.deciding.gridfit import fit_grid


def test_lean_and_spreads_are_recovered_from_draws_of_the_stated_model():
    # Draws from residual ~ N(lean * D, v + (s D)^2 + (k f d)^2) with known lean, s and k;
    # maximum likelihood on many checks returns them (common practice, no published source).
    rng = np.random.default_rng(0)
    n = 20000
    drop = rng.uniform(0.01, 0.2, n)
    forecast = rng.uniform(0.3, 1.0, n)
    doublings = rng.uniform(0.3, 2.0, n)
    noise = rng.uniform(0.005, 0.02, n) ** 2
    sd = np.sqrt(noise + (0.5 * drop) ** 2 + (0.04 * forecast * doublings) ** 2)
    residual = 0.4 * drop + sd * rng.standard_normal(n)
    c = fit_calibration(drop, residual, noise, forecast + residual, forecast, doublings,
                        settings=10 ** 8)
    assert c.lean_fitted == pytest.approx(0.4, abs=0.03)
    assert c.spread_fitted == pytest.approx(0.5, rel=0.1)
    assert c.level_spread_fitted == pytest.approx(0.04, rel=0.1)
    assert c.lean == pytest.approx(c.lean_fitted, rel=1e-3)     # almost no shrinkage left
    few = fit_calibration(drop[:40], residual[:40], noise[:40], (forecast + residual)[:40],
                          forecast[:40], doublings[:40], settings=4)
    assert 0 <= few.lean < few.lean_fitted                       # shrunk toward no lean


def _cells_from(truth, sizes, settings: int, seed: int) -> tuple[pd.DataFrame, dict]:
    rng = np.random.default_rng(seed)
    rows, scales = [], {}
    for s in range(settings):
        scales[s] = 1 + 0.3 * rng.random()
        for m in sizes:
            for fold in range(5):
                error = truth(m) * scales[s] * (1 + 0.02 * rng.standard_normal())
                rows.append({"capacity_index": s, "regularization_index": 0, "capacity": str(s),
                             "regularization": "-", "train_size": m, "repeat": 0, "fold": fold,
                             "train_error": 0.8 * error, "validation_error": error,
                             "status": "ok"})
    return pd.DataFrame(rows), scales


def test_an_optimistic_misspecified_family_is_caught_and_its_bands_widened():
    # The truth approaches its floor exponentially, e(m) = 0.3 + 0.5 exp(-m / 400); the power
    # laws overshoot past the data (forecasts too low). Synthetic data from a known model.
    def truth(m):
        return 0.3 + 0.5 * np.exp(-m / 400.0)

    sizes = np.array([50, 80, 130, 200, 320, 500, 800, 1280])
    cells, scales = _cells_from(truth, sizes, 30, seed=0)
    far = 4.0 * sizes[-1]
    outcomes = {}
    for calibrate in (False, True):
        grid = fit_grid(cells, calibrate=calibrate, share_floor=False)
        errors, inside = [], []
        for (s, _), fit in grid.items():
            true_value = truth(far) * scales[s]
            low, high = fit.band(far)
            errors.append((float(fit.predict(far)) - true_value) / true_value)
            inside.append(low <= true_value <= high)
        outcomes[calibrate] = (np.median(errors), np.mean(inside), grid.calibration)
    raw_error, raw_coverage, _ = outcomes[False]
    calibrated_error, calibrated_coverage, calibration = outcomes[True]
    assert raw_error < -0.03 and raw_coverage <= 0.5          # over-confident without it
    assert calibration.lean_fitted > 0 and calibration.lean > 0
    assert "optimistic" in calibration.sentence()
    assert raw_error < calibrated_error < 0                     # the lean moves toward the truth
    assert calibrated_coverage >= 0.9


def test_calibrated_forecasts_never_rise_and_bands_hold_the_point():
    def truth(m):
        return 0.3 + 0.5 * np.exp(-m / 400.0)

    cells, _ = _cells_from(truth, np.array([50, 80, 130, 200, 320, 500, 800, 1280]), 6, seed=1)
    grid = fit_grid(cells, share_floor=False)
    sizes = np.geomspace(50, 1e7, 400)
    for fit in grid.values():
        assert fit.calibrated
        point = fit.predict(sizes)
        low, high = fit.band(sizes)
        assert np.all(np.diff(point) <= 1e-12)
        beyond = sizes > fit.sizes[-1]
        assert np.all(np.diff(high[beyond]) <= 1e-12)
        assert np.all(low <= point + 1e-12) and np.all(point <= high + 1e-12)
        assert np.all(point >= fit.asymptote - 1e-12)            # never below its own floor


def _corpus():
    path = Path(__file__).resolve().parents[1] / "benchmarks" / "corpus.py"
    spec = importlib.util.spec_from_file_location("gridplan_corpus", path)
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module          # its dataclasses look their module up
    spec.loader.exec_module(module)
    return module


@pytest.mark.parametrize("name, worst_median", [
    ("friedman-tree", 0.05),      # sklearn make_friedman1 (Friedman 1991), trees on a smooth target
    ("digits-ridge", 0.05),       # sklearn load_digits, linear classifier
    ("curved-linear", 0.02),      # generated curved target, straight line (bias stays)
])
def test_corpus_members_backtest_within_their_measured_figures(tmp_path, name, worst_median):
    # x4 backtests on members of benchmarks/corpus.py; the figures are those the corpus
    # script measured (README, "How far forecasts can be trusted").
    corpus = _corpus()
    member = next(m for m in corpus.MEMBERS if m.name == name)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        result = corpus.backtest_member(member, tmp_path, jobs=1)
    rows = result["rows"]
    assert result["calibration"]["spread"] > 0
    assert np.median([r["rel_error"] for r in rows]) <= worst_median
    assert np.mean([r["inside_band"] for r in rows]) >= 0.6


def test_a_misspecified_curve_misses_its_own_larger_sizes_and_says_by_how_much():
    # The exponential approach again: the power laws' refits on the smaller sizes miss the
    # larger ones, and each setting's own check error is that miss (reference: the median
    # |forecast / measured - 1| of the refits, recomputed here from the same refits).
    def truth(m):
        return 0.3 + 0.5 * np.exp(-m / 400.0)
    cells, _ = _cells_from(truth, np.array([50, 80, 130, 200, 320, 500, 800, 1280]), 6, seed=2)
    grid = fit_grid(cells, share_floor=False)
    errors = np.array([fit.own_check_error for fit in grid.values()])
    assert np.all(errors > 0.003) and np.median(errors) < 0.2
    from gridplan.deciding.calibration import check_problems, own_check_error
    from gridplan.deciding.curves import fit_problems
    from gridplan.deciding.gridfit import _key, _settings_data
    data = _settings_data(cells, 0)[0]
    checks = check_problems(data)
    refits = fit_problems([p for p, _ in checks], ("pow3", "pow4", "mmf4", "wbl4"), 12)
    again = own_check_error(list(zip(refits, [h for _, h in checks])))
    assert again == pytest.approx(grid[_key(data)].own_check_error, rel=1e-12)
