"""The advisor on real runs: bias, variance, the noise floor, binding limits, failed cells, text."""

from __future__ import annotations

import json
import shutil

import numpy as np
import pandas as pd
import pytest

from gridplan import api
from gridplan.api import open_run
from gridplan.common.errors import GridplanError
from gridplan.deciding.advisor import advise, parse_operating_point
from gridplan.deciding.gridfit import fit_grid
from gridplan.deciding.planner import ACTIONS
from gridplan.measuring.store import FoldRow, Store
from gridplan.showing.text import render_advice, rising_step_words
from tests.helpers import linear_data, quadratic_data, run_frame

SIGMA = 0.5
N_BOOT = 20


@pytest.fixture(scope="module")
def quadratic(tmp_path_factory):
    """Quadratic truth with N(0, 0.25) noise; straight line, quadratic and cubic fits."""
    tmp = tmp_path_factory.mktemp("bias")
    run_dir, cells = run_frame(tmp, quadratic_data(600, SIGMA, seed=3), {
        "data": {"target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 2, 3]},
                  "regularization": {"values": [1e-6]}},
        "sizes": {"values": [20, 40, 80, 160, 320, 480]},
        "resampling": {"folds": 5, "repeats": 1, "seed": 3},
        "goal": {"target": 0.3, "confidence": 0.9},
        "costs": {"per_sample": 0.4, "capacity_step": 150.0, "regularization_step": 5.0,
                  "max_samples": 5000}})
    return run_dir, fit_grid(cells, n_boot=N_BOOT, seed=0)


@pytest.fixture(scope="module")
def wide(tmp_path_factory):
    """Six inputs, a mostly linear truth with weak interactions and N(0, 1) noise; few rows."""
    tmp = tmp_path_factory.mktemp("variance")
    rng = np.random.default_rng(4)
    X = rng.normal(size=(500, 6))
    y = (X @ np.array([1.0, -0.5, 0.5, 0.8, 0.3, -0.7]) + 0.4 * X[:, 0] * X[:, 1]
         + 0.3 * X[:, 2] ** 2 + 0.3 * X[:, 1] * X[:, 3] + rng.normal(size=500))
    frame = pd.DataFrame(X, columns=[f"x{i}" for i in range(6)])
    frame["y"] = y
    run_dir, cells = run_frame(tmp, frame, {
        "data": {"target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 2]},
                  "regularization": {"values": [1e-6, 10.0]}},
        "sizes": {"values": [50, 70, 100, 140]},
        "resampling": {"folds": 5, "repeats": 3, "seed": 3},
        "costs": {"regularization_step": 50.0, "max_samples": 5000}})
    # These tests check the planner's rules on given bands, so the curves carry no
    # calibration (its widening is tested in test_calibration.py).
    return run_dir, fit_grid(cells, n_boot=N_BOOT, seed=0, calibrate=False)


def test_high_bias_ranks_more_capacity_first(quadratic):
    run_dir, curves = quadratic
    advice = advise(run_dir, at="1,1e-06", curves=curves)
    # A straight line on quadratic data: training error itself above the target, curves
    # close and flat (common practice, no published source).
    assert advice["verdict"] == "high-bias"
    assert advice["target"] == 0.3                      # from the config's goal
    assert advice["actions"][0]["action"] == "more-capacity"
    assert advice["actions"][0]["action"] != "more-data"
    assert advice["reachable"] and advice["binding_limit"] is None
    assert [s["action"] for s in advice["plan"]] == ["more-capacity"]
    assert advice["plan"][0]["cost"] == advice["plan"][0]["cumulative_cost"] == 150.0
    assert advice["plan"][0]["predicted_error"] <= 0.3
    # every more-data action is still ranked, each with a plan cost above the capacity step
    data = [a for a in advice["actions"] if a["action"] == "more-data"]
    assert data and all(a["plan_cost"] > 150.0 for a in data)
    assert {a["action"] for a in advice["actions"]} <= set(ACTIONS)
    json.dumps(advice.to_dict())                                 # the JSON face needs plain values


def test_numbers_behind_the_verdict_come_from_the_store(quadratic):
    run_dir, curves = quadratic
    advice = advise(run_dir, at="1,1e-06", curves=curves)
    cells = open_run(run_dir).cells()
    rows = cells[(cells.capacity == "1") & (cells.train_size == 480)]
    d = advice["diagnosis"]
    assert d["train_error"] == pytest.approx(rows.train_error.mean(), rel=1e-12)
    assert d["validation_error"] == pytest.approx(rows.validation_error.mean(), rel=1e-12)
    text = render_advice(advice)
    assert "HIGH-BIAS" in text
    assert f"{d['train_error']:.3g}" in text and f"{d['validation_error']:.3g}" in text


def test_default_operating_point_is_the_best_measured_setting(quadratic):
    run_dir, curves = quadratic
    advice = advise(run_dir, curves=curves)
    cells = open_run(run_dir).cells()
    best = cells[cells.train_size == 480].groupby("capacity").validation_error.mean().idxmin()
    assert advice["operating_point"]["capacity"] == best
    assert advice["operating_point"]["size"] == 480
    assert advice["verdict"] == "fine" and advice["plan"] == [] and advice["plan_cost"] == 0


def test_target_below_the_noise_floor_is_unreachable(quadratic):
    run_dir, curves = quadratic
    # Regression with N(0, sigma^2) noise: best reachable MSE is sigma^2 = 0.25 (standard result).
    advice = advise(run_dir, target=0.8 * SIGMA ** 2, curves=curves)
    assert not advice["reachable"]
    assert advice["binding_limit"] == "noise floor"
    assert "the data's noise floor" in advice["binding_detail"]
    assert "different capacity" in advice["noise_floor_evidence"]
    assert advice["noise_floor_band"][0] <= SIGMA ** 2 <= advice["noise_floor_band"][1]
    assert advice["plan"] == [] and advice["plan_cost"] is None
    assert all(not a["reachable"] and a["plan_cost"] is None for a in advice["actions"])
    assert "Binding limit: noise floor" in render_advice(advice)


def test_high_variance_cheap_data_wins_and_expensive_data_lets_regularisation_win(wide):
    run_dir, curves = wide
    cheap = advise(run_dir, target=1.17, at="2,1e-06", per_sample=0.01, curves=curves)
    assert cheap["verdict"] == "high-variance"
    assert cheap["diagnosis"]["gap_test"]["p_value"] < 0.05
    assert cheap["actions"][0]["action"] == "more-data"
    assert cheap["plan"][0]["action"] == "more-data"
    # A state meets the target when its whole 90% interval lies at or below it. At 140 rows the
    # regularised setting's interval (corrected t, 15 folds) reaches about 1.30, the operating
    # point's higher; a target of 1.31 is met by regularising alone or by a little more data.
    cheap = advise(run_dir, target=1.31, at="2,1e-06", per_sample=0.01, curves=curves)
    assert cheap["actions"][0]["action"] == "more-data"
    dear = advise(run_dir, target=1.31, at="2,1e-06", per_sample=10.0, curves=curves)
    assert dear["actions"][0]["action"] == "more-regularization"
    assert dear["plan_cost"] == 50.0
    assert dear["plan"][0]["to"]["measured"] and dear["plan"][0]["to"]["error_at_confidence"] <= 1.31
    # same run, same curves: only the costs changed, so the forecasts agree
    assert dear["actions"][0]["predicted_error"] == next(
        a for a in cheap["actions"] if a["action"] == "more-regularization")["predicted_error"]


def test_max_samples_binds_when_the_curve_needs_more_rows(wide):
    run_dir, curves = wide
    open_ended = advise(run_dir, target=1.15, at="2,1e-06", curves=curves)
    assert open_ended["reachable"]
    assert any(s["action"] == "more-data" for s in open_ended["plan"])
    capped = advise(run_dir, target=1.15, at="2,1e-06", max_samples=150, curves=curves)
    assert not capped["reachable"]
    assert capped["binding_limit"] == "max_samples"
    assert "150" in capped["binding_detail"]


def test_one_capacity_grid_names_the_capacity_range(tmp_path):
    run_dir, cells = run_frame(tmp_path, quadratic_data(400, SIGMA, seed=5), {
        "data": {"target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1]}},
        "sizes": {"values": [20, 40, 80, 160, 320]},
        "resampling": {"folds": 5, "repeats": 1, "seed": 1}})
    advice = advise(run_dir, target=0.5, n_boot=N_BOOT)
    assert not advice["reachable"]
    assert advice["binding_limit"] == "capacity range"
    assert "extend the grid" in advice["binding_detail"]
    assert advice["verdict"] == "high-bias"


def test_failed_cells_are_skipped_and_reported(quadratic, tmp_path):
    run_dir, _ = quadratic
    copy = tmp_path / "copy"
    shutil.copytree(run_dir, copy)
    with Store.open_existing(copy) as store:
        store.write_rows([FoldRow(2, 0, 5, 0, 1, 480, None, None, 0.01, "failed", "plain",
                                  "LinAlgError: SVD did not converge")])
    advice = advise(copy, at="1,1e-06", n_boot=N_BOOT)
    assert advice["skipped"]["failed_rows"] == 1
    assert advice["skipped"]["settings"][0]["capacity"] == "3"
    text = render_advice(advice)
    assert "Skipped: 1 failed fold rows" in text and "SVD did not converge" in text
    assert advice["actions"][0]["action"] == "more-capacity"


def test_bad_input_is_one_sentence(quadratic):
    run_dir, curves = quadratic
    with pytest.raises(GridplanError, match="'7,1e-06' names no setting"):
        advise(run_dir, at="7,1e-06", curves=curves)
    with pytest.raises(GridplanError, match="target must be a positive error"):
        advise(run_dir, target=-1.0, curves=curves)
    with pytest.raises(GridplanError, match="confidence"):
        advise(run_dir, confidence=1.5, curves=curves)
    with pytest.raises(GridplanError, match="per_sample"):
        advise(run_dir, per_sample=-2.0, curves=curves)


def test_operating_point_labels_may_contain_commas():
    # nested feature sets are labelled "a,b", "+c"
    assert parse_operating_point("a,b,0.1", ["a,b", "+c"], ["0.1", "1"]) == (0, 0)
    assert parse_operating_point("+c,1", ["a,b", "+c"], ["0.1", "1"]) == (1, 1)
    assert parse_operating_point("+c", ["a,b", "+c"], ["none"]) == (1, 0)


def test_axis_direction_follows_the_parameter_meaning(tmp_path):
    # reference library: scikit-learn's LogisticRegression regularises more as C gets smaller, and a
    # tree as max_leaf_nodes gets smaller; "more-regularization" must step that way
    from gridplan.measuring.config import load_config
    from tests.helpers import write_config
    frame = linear_data(200, 2, 0.5, seed=1)
    frame["y"] = (frame["y"] > frame["y"].median()).astype(int)
    frame.to_csv(tmp_path / "data.csv", index=False)
    base = {"data": {"path": "data.csv", "target": "y", "task": "classification"},
            "model": {"estimator": "sklearn.linear_model.LogisticRegression",
                      "capacity": {"param": "max_iter", "values": [200]},
                      "regularization": {"param": "C", "values": [0.01, 1.0, 100.0]}},
            "sizes": {"values": [40, 120]}, "resampling": {"folds": 3}}
    config = load_config(write_config(tmp_path, base))
    assert config.regularization.more == "smaller"
    assert config.regularization.values == (100.0, 1.0, 0.01)
    run_dir = api.run(config, out=tmp_path / "run", jobs=1)
    advice = advise(run_dir, target=0.05, at="200,100", n_boot=10)
    step = next(a for a in advice["actions"] if a["action"] == "more-regularization")
    assert step["to"]["regularization"] == "1"
    assert next(a for a in advice["actions"] if a["action"] == "less-regularization")["to"] is None
    # an explicit `more` overrides the known meaning
    base["model"]["regularization"]["more"] = "larger"
    assert load_config(write_config(tmp_path, base)).regularization.values == (0.01, 1.0, 100.0)


def test_a_mean_below_the_target_is_not_yet_a_confident_one(wide):
    # common practice, no published source: the verdict reads the mean, the plan the whole interval;
    # when they disagree the advice says so
    run_dir, curves = wide
    advice = advise(run_dir, target=1.19, at="2,1e-06", per_sample=0.01, curves=curves)
    point = advice["diagnosis"]["validation_error"]
    assert point <= 1.19 and advice["verdict"] == "fine"
    assert advice["reachable"] and advice["plan"], "the interval at 140 rows reaches above 1.19"
    assert advice["plan"][-1]["to"]["error_at_confidence"] <= 1.19
    assert "does not yet lie below it" in render_advice(advice)


def _noisy_smooth_frame(n: int = 3000) -> pd.DataFrame:
    """A smooth function of three inputs plus N(0, 2^2) noise: the data's floor is 4.0."""
    rng = np.random.default_rng(5)
    X = rng.uniform(-2, 2, size=(n, 3))
    y = 3 * np.sin(X[:, 0]) + X[:, 1] ** 2 + X[:, 0] * X[:, 2] + rng.normal(scale=2.0, size=n)
    return pd.DataFrame(X, columns=["a", "b", "c"]).assign(y=y)


def test_a_tree_plateau_is_not_called_the_noise_floor(tmp_path):
    # Synthetic data with a known noise floor (variance 4.0). Trees level off above it at
    # these sizes while their validation error still falls and the gap is large: the
    # advice must not say the floor blocks the target or that only new information helps
    # (common practice, no published source). A smooth model meets the target today.
    frame = _noisy_smooth_frame()
    base = {"data": {"target": "y"}, "sizes": {"count": 6}, "resampling": {"folds": 5},
            "goal": {"target": 4.6}}
    tree_dir, _ = run_frame(tmp_path, frame, {
        **base, "model": {"family": "tree", "capacity": {"values": [2, 4, 8, 12]},
                          "regularization": {"param": "min_samples_leaf", "values": [1, 20]}}},
        out="tree")
    advice = advise(tree_dir)
    assert advice["verdict"] == "high-variance"
    assert advice["binding_limit"] != "noise floor"
    assert "only new information" not in render_advice(advice)
    assert advice["plateau"] is not None
    if advice["noise_floor"] is not None:
        assert advice["noise_floor_band"][0] <= 4.0 + 0.3
    else:        # the report says the same as the JSON
        from gridplan.showing.report import write_report
        html = write_report(tree_dir).read_text(encoding="utf-8")
        assert 'id="tile-floor"' in html and ">unknown<" in html
        assert "this model&#x27;s lowest plateau" in html or "this model's lowest plateau" in html
    smooth_dir, _ = run_frame(tmp_path, frame, {
        **base, "model": {"family": "poly-ridge", "capacity": {"values": [2, 3, 4]},
                          "regularization": {"values": [0.01, 1.0]}}}, out="smooth",
        name="smooth.toml")
    smooth = advise(smooth_dir)
    assert smooth["verdict"] == "fine" and smooth["reachable"]


def test_settings_are_named_by_value_as_the_config_writes_them():
    labels = ["1e-06", "0.01", "1"]
    for written in ("1e-6", "1e-06", "0.000001", "1.0E-6"):
        assert parse_operating_point(f"2,{written}", ["1", "2"], labels) == (1, 0)
    assert parse_operating_point("2.0,1", ["1", "2"], labels) == (1, 2)
    with pytest.raises(GridplanError, match="names no setting"):
        parse_operating_point("2,1e-5", ["1", "2"], labels)


def test_the_headline_says_what_to_do_what_it_costs_and_what_to_expect(quadratic):
    run_dir, curves = quadratic
    advice = advise(run_dir, at="1,1e-06", curves=curves)
    step = advice["plan"][-1]
    low, high = step["to"]["interval"]
    # e.g. "Switch to degree 2: expected 0.254 (0.24-0.268), cost 150."
    assert advice["headline"] == (f"Switch to degree {step['to']['capacity']}: expected "
                                  f"{step['predicted_error']:.3g} ({low:.3g}-{high:.3g}), cost 150.")
    text = render_advice(advice)
    assert text.splitlines()[0] == advice["headline"]
    assert "150.00" not in text and "cost 150" in text          # whole costs without decimals
    fine = advise(run_dir, curves=curves)
    assert fine["headline"].startswith("Nothing to do: degree ")
    blocked = advise(run_dir, target=0.8 * SIGMA ** 2, curves=curves)
    assert blocked["headline"] == ("No plan reaches the target 0.2 at 90% confidence: it lies below "
                                   "the data's noise floor; only new information (better features, "
                                   "cleaner labels) can help.")
    # more-data moves beyond the cheapest are listed once, on one line
    lines = [line for line in render_advice(blocked).splitlines() if "more-data" in line]
    assert len(lines) == 1
    assert sum("more data to other sizes" in line for line in render_advice(blocked).splitlines()) == 1


def test_no_forecast_lies_below_the_stated_floor_and_rising_steps_say_why(quadratic):
    # common practice, no published source: the advice never contradicts its own floor
    run_dir, curves = quadratic
    rising = 0
    cases = [(0.27, "1,1e-06"), (0.3, "1,1e-06"), (0.5, "1,1e-06"),
             (0.285, "1,1e-06"), (0.285, "2,1e-06")]    # the last two plan rising steps
    for target, at in cases:
        advice = advise(run_dir, target=target, at=at, curves=curves)
        floor = advice["noise_floor"]
        states = [s["to"] for s in advice["plan"]] + [a["to"] for a in advice["actions"] if a["to"]]
        for state in states:
            if not state["measured"]:
                assert state["predicted_error"] >= floor - 1e-12
        text = render_advice(advice)
        for number, step in enumerate(advice["plan"], 1):
            assert step["worse_on_the_way"] == (step["to"]["predicted_error"]
                                               > step["from"]["predicted_error"])
            if step["worse_on_the_way"]:
                rising += 1
                words = rising_step_words(step, last=number == len(advice["plan"]))
                assert words in text
                assert (("steps after it" in words) == (number < len(advice["plan"]))
                        and ("whole interval lies at or below the target" in words)
                        == (number == len(advice["plan"])))
    assert rising >= 2, "the fixture is meant to plan rising steps, last and not last"


def test_actions_tied_on_plan_cost_collapse_to_one_line(quadratic):
    run_dir, curves = quadratic
    advice = advise(run_dir, at="1,1e-06", curves=curves)
    text = render_advice(advice)
    costs = [a["plan_cost"] for a in advice["actions"]
             if a["reachable"] and a["action"] != "more-data"]
    for cost in set(costs):
        shown = [line for line in text.splitlines()
                 if line.strip().startswith(("more-capacity", "less-capacity", "more-regularization",
                                             "less-regularization"))
                 and f"plan {cost:,.0f}" in line]
        assert len(shown) <= 1          # one line per plan cost; the rest on a "same plan cost" line


def test_a_report_after_advise_fits_no_curves(tmp_path, monkeypatch):
    from gridplan.deciding import curvestore
    from gridplan.showing.report import write_report
    run_dir, _ = run_frame(tmp_path, quadratic_data(300, SIGMA, seed=8), {
        "data": {"target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 2]},
                  "regularization": {"values": [1e-3, 1.0]}},
        "sizes": {"values": [20, 40, 80, 160, 240]}, "resampling": {"folds": 5},
        "goal": {"target": 0.3}})
    advise(run_dir)

    def no_fitting(*args, **kwargs):
        raise AssertionError("the curves were fitted again")

    monkeypatch.setattr(curvestore, "fit_grid", no_fitting)
    assert write_report(run_dir).is_file()


def test_a_last_more_data_step_above_the_measured_mean_says_why():
    # The benchmark grid's plan: the curve at 4,525 rows (0.0918) sits above the mean
    # measured at 3,200 (0.0904), yet its whole interval is below the target 0.1.
    step = {"action": "more-data", "predicted_error": 0.0918,
            "from": {"measured": True, "size": 3200, "predicted_error": 0.0904},
            "to": {"measured": False, "size": 4525, "predicted_error": 0.0918}}
    assert rising_step_words(step, last=True) == (
        "the curve fitted to every size runs 0.00140 above the mean measured at 3,200 rows, "
        "but here the whole interval lies at or below the target")
    step["action"] = "more-capacity"
    assert rising_step_words(step, last=False) == (
        "the error rises by 0.00140 on this step, from 0.0904: it is the cheapest way to the "
        "steps after it, which end at the target")
