"""Diagnosis: the corrected resampled t-test, verdict rules, the noise floor and agreement with the store."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from gridplan.common.errors import GridplanError
from gridplan.deciding.diagnosis import (
    Thresholds,
    corrected_t_test,
    corrected_variance_factor,
    diagnose_grid,
    estimate_noise_floor,
    verdict_for,
)
from gridplan.deciding.gridfit import fit_grid
from tests.helpers import quadratic_data, run_frame

SIGMA = 0.5


def test_corrected_factor_for_ten_fold_cross_validation():
    # Nadeau & Bengio 2003, Machine Learning 52: 1/J + n_test/n_train; 10-fold CV on
    # n rows gives 1/10 + (n/10)/(9n/10) = 1/10 + 1/9 = 0.2111.
    assert corrected_variance_factor(10, 900, 100) == pytest.approx(0.21111, abs=1e-5)
    # 5 x 2 cross-validation (r = 5 repeats of k = 2 folds): 1/10 + 1 = 1.1 (same formula).
    assert corrected_variance_factor(10, 500, 500) == pytest.approx(1.1)
    with pytest.raises(GridplanError):
        corrected_variance_factor(0, 10, 10)


def test_corrected_t_statistic_shrinks_the_plain_one_by_the_factor():
    rng = np.random.default_rng(0)
    d = rng.normal(0.3, 0.5, size=10)
    result = corrected_t_test(d, n_train=900, n_test=100, confidence=0.9)
    # Reference library: scipy.stats.ttest_1samp gives t = mean / (s / sqrt(J)); the
    # corrected statistic replaces 1/J by 1/J + n_test/n_train (Nadeau & Bengio 2003).
    plain = stats.ttest_1samp(d, 0.0, alternative="greater")
    assert result.t == pytest.approx(plain.statistic * math.sqrt(0.1 / (0.1 + 1 / 9)))
    assert result.p_value == pytest.approx(stats.t.sf(result.t, 9))
    assert result.p_value > plain.pvalue
    half = stats.t.ppf(0.95, 9) * math.sqrt((0.1 + 1 / 9) * d.var(ddof=1))
    assert (result.low, result.high) == pytest.approx((d.mean() - half, d.mean() + half))
    assert corrected_t_test([1.0], 10, 10) is None


def _test(p: float):
    from gridplan.deciding.diagnosis import CorrectedTest
    return CorrectedTest(0.1, 0.01, 0.2, 9, 10.0, p, 0.0, 0.2, 0.9)


@pytest.mark.parametrize("train, valid, floor, p, expected", [
    (0.10, 0.18, 0.05, 0.2, "fine"),           # validation 0.18 <= target 0.2
    (0.20, 0.26, 0.25, 0.001, "noise-floor"),  # within 5% of the floor 0.25
    (0.48, 0.50, 0.05, 0.001, "high-bias"),    # training excess 0.28 of 0.30 = 93%
    (0.05, 0.50, 0.05, 0.001, "high-variance"),  # gap explains all of the excess, significant
    (0.35, 0.50, 0.05, 0.001, "both"),         # 50% / 50%, gap significant
    (0.35, 0.50, 0.05, 0.40, "high-bias"),     # gap not significant: the larger share, tie -> bias
    (0.15, 0.50, 0.05, 0.40, "high-variance"),  # gap not significant but the only share
])
def test_verdict_rules(train, valid, floor, p, expected):
    verdict, bias_share, variance_share, reason = verdict_for(
        train, valid, 0.2, floor, _test(p), Thresholds())
    assert verdict == expected
    if expected not in ("fine",):
        assert bias_share + variance_share == pytest.approx(1.0)
    assert f"{valid:.3g}" in reason and f"{train:.3g}" in reason


def test_thresholds_are_checked():
    with pytest.raises(GridplanError, match="alpha"):
        Thresholds(alpha=1.5)
    with pytest.raises(GridplanError, match="floor_margin"):
        Thresholds(floor_margin=-0.1)


@pytest.fixture(scope="module")
def quadratic_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("diag")
    run_dir, cells = run_frame(tmp, quadratic_data(600, SIGMA, seed=3), {
        "data": {"target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 2, 3]},
                  "regularization": {"values": [1e-6]}},
        "sizes": {"values": [20, 40, 80, 160, 320, 480]},
        "resampling": {"folds": 5, "repeats": 1, "seed": 3}})
    # mark one fold of the straight line at the largest size as failed: it must be skipped
    failed = (cells.capacity_index == 0) & (cells.train_size == 480) & (cells.fold == 0)
    cells = cells.copy()
    cells.loc[failed, "status"] = "failed"
    curves = fit_grid(cells, n_boot=20, seed=0)
    return run_dir, cells, curves


def test_diagnosis_numbers_agree_with_the_store(quadratic_run):
    _, cells, curves = quadratic_run
    floor = estimate_noise_floor(curves, 0.9)
    diagnoses = diagnose_grid(cells, curves, target=0.3, n_test=120.0, confidence=0.9,
                              noise_floor=floor.value)
    ok = cells[cells.status == "ok"]
    for (ci, ri), d in diagnoses.items():
        rows = ok[(ok.capacity_index == ci) & (ok.regularization_index == ri) & (ok.train_size == 480)]
        assert d.size == 480
        assert d.train_error == pytest.approx(rows.train_error.mean(), rel=1e-12)
        assert d.validation_error == pytest.approx(rows.validation_error.mean(), rel=1e-12)
        assert d.gap == pytest.approx(d.validation_error - d.train_error)
        assert d.units == len(rows)
        assert d.gap_test.mean == pytest.approx(d.gap, rel=1e-9)
        # 5-fold CV on 600 rows: 120 test rows; a cell of 480 training rows -> 1/J + 120/480
        # (Nadeau & Bengio 2003)
        assert d.gap_test.factor == pytest.approx(1 / d.units + 120 / 480)
        # excess over target splits exactly into the data-removable and the fixed part
        assert d.removable_by_data + d.not_removable == pytest.approx(d.validation_error - 0.3)
    assert diagnoses[(0, 0)].units == 4 and diagnoses[(0, 0)].failed_rows == 1
    # a straight line on quadratic data is biased: training error itself far above the target
    # (common practice, no published source)
    assert diagnoses[(0, 0)].verdict == "high-bias"
    assert diagnoses[(0, 0)].bias_share > 0.9
    # its curve has flattened: the drop per doubling is not significant, the gap neither
    assert not diagnoses[(0, 0)].drop_per_doubling.significant(0.05)
    assert not diagnoses[(0, 0)].gap_test.significant(0.05)


def test_noise_floor_estimate_brackets_the_synthetic_noise(quadratic_run):
    _, _, curves = quadratic_run
    floor = estimate_noise_floor(curves, 0.9)
    # Regression with N(0, sigma^2) noise: best reachable MSE is sigma^2 = 0.25 (standard result).
    # degrees 2 and 3 both level off at the floor: that agreement is the evidence
    assert floor.capacity_index in (1, 2) and floor.regularization_index == 0
    assert "different capacity" in floor.evidence
    assert floor.low <= SIGMA ** 2 <= floor.high
    assert floor.value == pytest.approx(SIGMA ** 2, rel=0.1)
