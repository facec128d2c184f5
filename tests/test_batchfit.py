"""Batched curve fitting against scipy's own solvers, and curves kept in the run folder."""

from __future__ import annotations

import numpy as np
import pytest

from gridplan.deciding.batchfit import fit_batch, nonnegative_line
from gridplan.deciding.shapes import FAMILIES, start_points

SIZES = np.array([40, 80, 160, 320, 640, 1280, 2560], dtype=float)
TRUTH = {"pow3": (0.2, 3.0, 0.6), "pow4": (0.2, 0.02, 0.7, 1.0),
         "mmf4": (0.9, 400.0, 0.2, 1.2), "wbl4": (0.2, 0.6, 0.004, 0.8)}


def _formula(family: str, m: np.ndarray) -> np.ndarray:
    a, b, c, *d = TRUTH[family]
    if family == "pow3":
        return a + b * m ** -c
    if family == "pow4":
        return a + (b * m + d[0]) ** -c
    if family == "mmf4":
        return (a * b + c * m ** d[0]) / (b + m ** d[0])
    return a + b * np.exp(-c * m ** d[0])


def _noisy_problems(family: str, count: int, seed: int):
    rng = np.random.default_rng(seed)
    truth = _formula(family, SIZES)
    y = truth * (1 + 0.03 * rng.standard_normal((count, SIZES.size)))
    se = np.abs(truth) * 0.03 * (0.5 + rng.random((count, SIZES.size)))
    x = np.tile(SIZES / SIZES[-1], (count, 1))
    return x, y, 1.0 / se


@pytest.mark.parametrize("family", sorted(TRUTH))
def test_batched_fits_reach_scipys_least_squares_cost(family):
    # Reference: scipy.optimize.least_squares (trust-region reflective, same
    # bounds, analytic Jacobian, same start), one problem at a time.
    from scipy.optimize import least_squares
    fam = FAMILIES[family]
    x, y, w = _noisy_problems(family, 30, seed=3)
    start = start_points(family, x, y, w)[0]
    lower = np.array(fam.lower, dtype=float)
    upper = np.array(fam.upper, dtype=float)
    theta, cost = fit_batch(fam.evaluate, fam.jacobian, x, y, w, start, lower, upper)
    assert np.all(theta >= lower - 1e-12) and np.all(theta <= upper + 1e-12)
    worse = 0
    for k in range(len(x)):
        reference = least_squares(
            lambda t: (fam.evaluate(x[k], t) - y[k]) * w[k],
            np.clip(start[k], lower, np.minimum(upper, 1e12)), bounds=(lower, upper),
            jac=lambda t: fam.jacobian(x[k], t) * w[k][:, None], method="trf", x_scale="jac")
        assert np.isfinite(cost[k])
        worse += cost[k] > reference.cost * (1 + 1e-3) + 1e-9
    assert worse <= 1, f"{worse} of {len(x)} batched fits ended above scipy's cost"


def test_nonnegative_line_equals_scipy_nnls():
    # Reference: scipy.optimize.nnls on the weighted design [1, basis].
    from scipy.optimize import nnls
    rng = np.random.default_rng(5)
    basis = rng.random((200, 6)) * 3
    y = rng.normal(size=(200, 6)) + rng.choice([-2.0, 0.0, 2.0], size=(200, 1)) * basis
    w = rng.random((200, 6)) + 0.1
    a, b, rss = nonnegative_line(basis, y, w)
    for k in range(200):
        coef, norm = nnls(np.column_stack([np.ones(6), basis[k]]) * w[k][:, None], y[k] * w[k])
        assert rss[k] == pytest.approx(norm ** 2, rel=1e-9, abs=1e-12)
        assert (a[k], b[k]) == pytest.approx(tuple(coef), rel=1e-6, abs=1e-9)


def test_missing_points_carry_no_weight():
    fam = FAMILIES["pow3"]
    x = np.tile(SIZES / SIZES[-1], (2, 1))
    y = np.tile(0.1 + 0.5 * x[0] ** -0.5, (2, 1))
    w = np.ones_like(y)
    y[1, 3], w[1, 3] = 1e6, 0.0       # a wild value at a point marked missing
    start = np.array([[0.0, 1.0, 1.0]] * 2)
    theta, cost = fit_batch(fam.evaluate, fam.jacobian, x, y, w, start, fam.lower, fam.upper)
    assert theta[0] == pytest.approx([0.1, 0.5, 0.5], abs=1e-6)
    assert theta[1] == pytest.approx(theta[0], abs=1e-6)


# --- curves kept in the run folder ----------------------------------------------

def _small_run(tmp_path):
    from tests.helpers import quadratic_data, run_frame
    return run_frame(tmp_path, quadratic_data(400, 0.5, seed=2), {
        "data": {"target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 2, 3]},
                  "regularization": {"values": [1e-3, 1.0]}},
        "sizes": {"values": [20, 40, 80, 160, 320]}, "resampling": {"folds": 5},
        "goal": {"target": 0.3}})


def test_a_second_advise_fits_nothing_and_gives_the_same_advice(tmp_path, monkeypatch):
    from gridplan.deciding import curvestore
    from gridplan.deciding.advisor import advise
    run_dir, _ = _small_run(tmp_path)
    first = advise(run_dir)
    assert (run_dir / curvestore.CURVES_NAME).is_file()

    def no_fitting(*args, **kwargs):
        raise AssertionError("the curves were fitted again")

    monkeypatch.setattr(curvestore, "fit_grid", no_fitting)
    assert advise(run_dir) == first
    from gridplan import api
    cached = api.fit_curves(run_dir)
    assert cached.from_cache
    monkeypatch.undo()
    fresh = curvestore.fit_grid(api.open_run(run_dir).cells())
    assert sorted(cached) == sorted(fresh)
    for key, fit in fresh.items():       # JSON keeps every float exactly
        np.testing.assert_array_equal(cached[key].boot_theta, fit.boot_theta)
        assert cached[key].band(1000.0) == fit.band(1000.0)
        assert cached[key].own_check_error == fit.own_check_error
    assert cached.floor == fresh.floor


def test_changed_cells_are_fitted_again(tmp_path, monkeypatch):
    from gridplan import api
    from gridplan.deciding import curvestore
    run_dir, cells = _small_run(tmp_path)
    api.fit_curves(run_dir)
    calls = []
    original = curvestore.fit_grid
    monkeypatch.setattr(curvestore, "fit_grid", lambda *a, **k: calls.append(1) or original(*a, **k))
    changed = cells.copy()
    changed.loc[0, "validation_error"] += 1e-9
    curvestore.cached_curves(run_dir, changed)
    assert calls == [1]
    curvestore.cached_curves(run_dir, changed)
    curvestore.cached_curves(run_dir, cells)         # the earlier state is still kept
    assert calls == [1]
    curvestore.cached_curves(run_dir, cells, n_boot=50)
    assert calls == [1, 1]


def test_a_damaged_curves_file_is_ignored_and_rewritten(tmp_path):
    from gridplan import api
    from gridplan.deciding import curvestore
    run_dir, _ = _small_run(tmp_path)
    (run_dir / curvestore.CURVES_NAME).write_text("{not json")
    assert not api.fit_curves(run_dir).from_cache
    assert api.fit_curves(run_dir).from_cache


def test_a_parameter_at_its_bound_does_not_freeze_the_others():
    # A flat curve pins pow3's exponent at its bound with a vanishing amplitude, whose
    # Jacobian column dwarfs the asymptote's; the asymptote must still move to the
    # weighted mean (reference: scipy.optimize.least_squares from the same start).
    from scipy.optimize import least_squares
    fam = FAMILIES["pow3"]
    sizes = np.array([30, 51, 88, 150, 255, 436, 745, 1273.0])
    y = np.array([[6.9, 6.5, 8.2, 6.6, 7.1, 9.3, 7.1, 6.3]])
    w = 1.0 / np.array([[1.0, 0.5, 1.7, 0.9, 0.7, 2.4, 1.1, 0.9]])
    x = sizes[None, :] / sizes[-1]
    start = np.array([[6.15, 1e-17, 10.0]])
    theta, cost = fit_batch(fam.evaluate, fam.jacobian, x, y, w, start, fam.lower, fam.upper)
    reference = least_squares(lambda t: (fam.evaluate(x[0], t) - y[0]) * w[0], start[0],
                              bounds=(fam.lower, fam.upper), method="trf", x_scale="jac")
    assert cost[0] <= reference.cost * (1 + 1e-6)
    assert theta[0, 0] == pytest.approx(np.sum(w ** 2 * y) / np.sum(w ** 2), rel=0.02)


def test_slow_valleys_are_followed_to_the_bottom():
    # Fits from the benchmark grid that took fixed damping factors more than 200
    # iterations (tests/data/slow_fits.json). Reference: scipy.optimize.least_squares
    # (trf, same bounds) started from gridplan's answer finds no lower cost.
    import json
    from pathlib import Path

    from scipy.optimize import least_squares
    problems = json.loads((Path(__file__).parent / "data" / "slow_fits.json").read_text())["problems"]
    assert {p["family"] for p in problems} == set(FAMILIES) - {"exp3"}
    for p in problems:
        fam = FAMILIES[p["family"]]
        x, y, w = (np.array([p[key]], dtype=float) for key in ("x", "y", "w"))
        lower, upper = np.array(p["lower"], dtype=float), np.array(fam.upper, dtype=float)
        theta, cost = fit_batch(fam.evaluate, fam.jacobian, x, y, w, np.array([p["start"]]),
                                lower[None, :], upper)

        def residuals(t, x=x[0], y=y[0], w=w[0], fam=fam):
            return np.where(w > 0, (fam.evaluate(x, t) - y) * w, 0.0)
        polished = least_squares(residuals, np.clip(theta[0], lower, upper), bounds=(lower, upper),
                                 method="trf", x_scale="jac", ftol=1e-12, xtol=1e-12, gtol=1e-12)
        assert cost[0] <= polished.cost * (1 + 1e-4) + 1e-15, p["family"]
