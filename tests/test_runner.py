"""The grid runner against scikit-learn and against textbook results."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.model_selection import learning_curve

from gridplan import api
from gridplan.common.errors import GridplanError
from gridplan.measuring.config import load_config
from gridplan.measuring.families import build_model
from gridplan.measuring.spec import resolve
from tests.helpers import linear_data, quadratic_data, run_frame, without_times, write_config


def _reference_errors(spec, ci, ri, scoring):
    """scikit-learn's learning_curve on the same splits and nested subsets."""
    model = build_model(spec.plan, ci, ri)
    cv = [(f.train, f.test) for f in spec.folds]
    _, train_scores, val_scores = learning_curve(
        model, spec.dataset.X, spec.dataset.y, train_sizes=list(spec.sizes), cv=cv,
        scoring=scoring, shuffle=False)
    return -train_scores, -val_scores   # shape (sizes, folds)


def _grid_errors(cells, ci, ri, n_sizes, n_folds):
    sub = cells[(cells.capacity_index == ci) & (cells.regularization_index == ri)]
    sub = sub.sort_values(["size_index", "repeat", "fold"])
    return (sub.train_error.to_numpy().reshape(n_sizes, n_folds),
            sub.validation_error.to_numpy().reshape(n_sizes, n_folds))


@pytest.mark.parametrize("fast_path, tolerance", [(False, 1e-9), (True, 1e-6)])
def test_cells_equal_sklearn_learning_curve_regression(tmp_path, fast_path, tolerance):
    # Reference library: sklearn.model_selection.learning_curve on the same
    # splits with shuffle=False takes train[:m], exactly our nested subsets.
    frame = linear_data(240, 3, 0.5, seed=1)
    frame["zone"] = np.random.default_rng(2).choice(["a", "b", "c"], size=len(frame))
    run_dir, cells = run_frame(tmp_path, frame, {
        "data": {"target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 2, 3]},
                  "regularization": {"values": [0.01, 1.0, 30.0]}},
        "sizes": {"values": [15, 40, 120, 180]},
        "resampling": {"folds": 4, "repeats": 2, "seed": 3},
        "run": {"fast_path": fast_path}})
    spec = resolve(load_config(tmp_path / "grid.toml"))
    assert len(cells) == 3 * 3 * 4 * 8 and (cells.status == "ok").all()
    for ci in range(3):
        for ri in range(3):
            ref_train, ref_val = _reference_errors(spec, ci, ri, "neg_mean_squared_error")
            got_train, got_val = _grid_errors(cells, ci, ri, 4, 8)
            np.testing.assert_allclose(got_train, ref_train, rtol=tolerance, atol=1e-12)
            np.testing.assert_allclose(got_val, ref_val, rtol=tolerance)


def test_cells_equal_sklearn_learning_curve_tree_classification(tmp_path):
    # Reference library: sklearn learning_curve with scoring="accuracy";
    # error rate = 1 - accuracy. Plain path (cost-complexity alpha).
    rng = np.random.default_rng(5)
    X = rng.normal(size=(300, 2))
    y = np.where(X[:, 0] + 0.5 * X[:, 1] ** 2 + rng.normal(scale=0.5, size=300) > 0.4, "yes", "no")
    frame = pd.DataFrame({"u": X[:, 0], "v": X[:, 1], "label": y})
    _, cells = run_frame(tmp_path, frame, {
        "data": {"target": "label", "task": "classification"},
        "model": {"family": "tree", "capacity": {"values": [1, 3, 6]},
                  "regularization": {"param": "ccp_alpha", "values": [0.0, 0.01]}},
        "sizes": {"values": [20, 80, 200]},
        "resampling": {"folds": 3, "repeats": 1, "seed": 0},
        "goal": {"metric": "error_rate"}})
    spec = resolve(load_config(tmp_path / "grid.toml"))
    assert set(cells.path) == {"plain"}
    for ci in range(3):
        for ri in range(2):
            ref_train, ref_val = _reference_errors(spec, ci, ri, "accuracy")
            got_train, got_val = _grid_errors(cells, ci, ri, 3, 3)
            np.testing.assert_allclose(got_train, 1 + ref_train, rtol=1e-9, atol=1e-12)
            np.testing.assert_allclose(got_val, 1 + ref_val, rtol=1e-9, atol=1e-12)


def test_log_loss_matches_sklearn_scorer(tmp_path):
    # Reference library: scoring="neg_log_loss" in learning_curve.
    rng = np.random.default_rng(8)
    X = rng.normal(size=(240, 2))
    y = (X[:, 0] - X[:, 1] + rng.normal(size=240) > 0).astype(int)
    frame = pd.DataFrame({"a": X[:, 0], "b": X[:, 1], "cls": y})
    _, cells = run_frame(tmp_path, frame, {
        "data": {"target": "cls", "task": "classification"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 2]},
                  "regularization": {"values": [0.1, 10.0]}},
        "sizes": {"values": [30, 150]}, "resampling": {"folds": 3},
        "goal": {"metric": "log_loss"}})
    spec = resolve(load_config(tmp_path / "grid.toml"))
    assert spec.plan.family == "poly-logistic"
    ref_train, ref_val = _reference_errors(spec, 1, 0, "neg_log_loss")
    got_train, got_val = _grid_errors(cells, 1, 0, 2, 3)
    np.testing.assert_allclose(got_val, ref_val, rtol=1e-9)
    np.testing.assert_allclose(got_train, ref_train, rtol=1e-9)


def test_ols_training_and_validation_mse_follow_textbook(tmp_path):
    # Standard result: E[RSS] = sigma^2 (n - p), so E[training MSE] of OLS is
    # sigma^2 (1 - p/n) with p counting the intercept; validation MSE tends to
    # sigma^2 as n grows (Gaussian design: sigma^2 (1 + p/(n - p - 1)) roughly).
    sigma, p_inputs = 1.0, 4
    frame = linear_data(2000, p_inputs, sigma, seed=11)
    _, cells = run_frame(tmp_path, frame, {
        "data": {"target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1]},
                  "regularization": {"values": [1e-9]}},
        "sizes": {"values": [12, 20, 50, 1600]},
        "resampling": {"folds": 5, "repeats": 10, "seed": 4}})
    p = p_inputs + 1
    for m, group in cells.groupby("train_size"):
        expected = sigma ** 2 * (1 - p / m)
        if m <= 50:  # small subsets of 2000 rows: the folds are nearly independent draws
            spread = group.train_error.std(ddof=1) / np.sqrt(len(group))
        else:  # large subsets share one noise realisation: sd of a chi-square mean
            spread = sigma ** 2 * np.sqrt(2 / len(frame))
        assert abs(group.train_error.mean() - expected) < 4 * spread, m
    val = cells.groupby("train_size").validation_error.mean()
    assert val.is_monotonic_decreasing
    assert abs(val.loc[1600] - sigma ** 2 * (1 + p / (1600 - p - 1))) < 0.05


def test_quadratic_interpolates_three_points_and_curves_move_the_right_way(tmp_path):
    # Common practice, no published source: a quadratic fitted without
    # regularisation to 3 or fewer points has zero training error; training
    # error rises and validation error falls with size for a correct model.
    frame = quadratic_data(600, 0.4, seed=2)
    _, cells = run_frame(tmp_path, frame, {
        "data": {"target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [2]},
                  "regularization": {"values": [1e-12]}},
        "sizes": {"values": [3, 10, 30, 100, 400]},
        "resampling": {"folds": 5, "repeats": 4, "seed": 1}})
    means = cells.groupby("train_size")[["train_error", "validation_error"]].mean()
    assert cells[cells.train_size == 3].train_error.max() < 1e-8
    assert means.train_error.is_monotonic_increasing
    assert means.validation_error.is_monotonic_decreasing


def _resume_config(tmp_path):
    frame = linear_data(300, 2, 0.3, seed=3)
    frame.to_csv(tmp_path / "data.csv", index=False)
    return load_config(write_config(tmp_path, {
        "data": {"path": "data.csv", "target": "y"},
        "model": {"family": "tree", "capacity": {"values": [1, 2, 4]},
                  "regularization": {"param": "ccp_alpha", "values": [0.0, 0.05]}},
        "sizes": {"values": [20, 60, 200]}, "resampling": {"folds": 3, "seed": 2}}))


def test_interrupted_run_resumes_to_the_uninterrupted_table(tmp_path):
    # Common practice, no published source: resuming must not change numbers.
    config = _resume_config(tmp_path)
    api.run(config, out=tmp_path / "whole", jobs=1)
    whole = api.open_run(tmp_path / "whole").cells()

    class Stop(Exception):
        pass

    def stop_after_some(done, total):
        if done >= 20:
            raise Stop

    with pytest.raises(Stop):
        api.run(config, out=tmp_path / "part", jobs=1, progress=stop_after_some)
    partial = api.open_run(tmp_path / "part").cells()
    assert 0 < len(partial) < len(whole)
    finished_before = without_times(partial)
    api.run(config, out=tmp_path / "part", jobs=1)
    resumed = api.open_run(tmp_path / "part").cells()
    pd.testing.assert_frame_equal(without_times(resumed), without_times(whole))
    # finished cells were not recomputed: their fit times are unchanged
    kept = resumed.merge(partial, on=["capacity_index", "regularization_index", "size_index",
                                      "repeat", "fold"], suffixes=("", "_before"))
    assert len(kept) == len(finished_before)
    assert (kept.fit_seconds == kept.fit_seconds_before).all()


def test_parallel_and_sequential_runs_are_identical(tmp_path, monkeypatch):
    # Common practice, no published source: the worker count must not change numbers.
    monkeypatch.setattr("gridplan.measuring.runner.LOCAL_ONLY_SECONDS", 0.0)   # force the worker pool
    config = _resume_config(tmp_path)
    api.run(config, out=tmp_path / "one", jobs=1)
    api.run(config, out=tmp_path / "two", jobs=2)
    one = without_times(api.open_run(tmp_path / "one").cells())
    two = without_times(api.open_run(tmp_path / "two").cells())
    pd.testing.assert_frame_equal(one, two)


def test_changed_config_is_refused_in_the_same_folder(tmp_path):
    config = _resume_config(tmp_path)
    api.run(config, out=tmp_path / "run", jobs=1)
    text = (tmp_path / "grid.toml").read_text().replace("seed = 2", "seed = 3")
    (tmp_path / "grid.toml").write_text(text)
    with pytest.raises(GridplanError, match="resampling"):
        api.run(load_config(tmp_path / "grid.toml"), out=tmp_path / "run", jobs=1)


def test_failing_cells_are_recorded_and_the_rest_completes(tmp_path):
    # A k-nearest-neighbours model cannot use more neighbours than rows.
    frame = linear_data(200, 2, 0.3, seed=4)
    _, cells = run_frame(tmp_path, frame, {
        "data": {"target": "y"},
        "model": {"estimator": "sklearn.neighbors.KNeighborsRegressor",
                  "capacity": {"param": "n_neighbors", "values": [1, 5, 30]}},
        "sizes": {"values": [10, 100]}, "resampling": {"folds": 2}})
    failed = cells[cells.status == "failed"]
    assert set(zip(failed.capacity, failed.train_size)) == {("30", 10)}
    assert failed.message.str.contains("ValueError").all()
    assert failed.train_error.isna().all()
    assert (cells[cells.status == "ok"].validation_error > 0).all()


def test_fast_path_is_chosen_only_where_it_is_exact(tmp_path):
    from gridplan.measuring.runner import fast_path_kind
    frame = linear_data(120, 2, 0.3, seed=4)
    frame.to_csv(tmp_path / "data.csv", index=False)

    def kind(model, metric="mse"):
        config = load_config(write_config(tmp_path, {
            "data": {"path": "data.csv", "target": "y"}, "model": model,
            "goal": {"metric": metric}}))
        return fast_path_kind(resolve(config).plan, metric)

    assert kind({"family": "poly-ridge", "capacity": {"values": [1, 2]}}) == "ridge-path"
    assert kind({"family": "poly-ridge", "params": {"fit_intercept": False},
                 "capacity": {"values": [1, 2]}}) is None
    assert kind({"family": "tree", "capacity": {"values": [1, 2]}}) == "tree-path"
    assert kind({"family": "tree", "capacity": {"values": [1, 2]},
                 "regularization": {"param": "ccp_alpha", "values": [0.0, 0.1]}}) is None
    assert kind({"family": "tree", "params": {"splitter": "random"},
                 "capacity": {"values": [1, 2]}}) is None
    assert kind({"estimator": "sklearn.linear_model.Ridge",
                 "capacity": {"param": "alpha", "values": [1.0]}}) is None


def test_fast_path_on_threads_equals_one_thread(tmp_path):
    # Common practice, no published source: fast-path tasks run on threads of
    # one process under one BLAS thread each; the numbers must not change.
    frame = linear_data(400, 3, 0.5, seed=12)
    frame.to_csv(tmp_path / "data.csv", index=False)
    config = load_config(write_config(tmp_path, {
        "data": {"path": "data.csv", "target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 2, 3, 4]},
                  "regularization": {"values": [1e-4, 0.1, 10.0]}},
        "sizes": {"count": 5, "smallest": 20}, "resampling": {"folds": 4, "repeats": 2}}))
    api.run(config, out=tmp_path / "one", jobs=1)
    api.run(config, out=tmp_path / "two", jobs=2)
    one = api.open_run(tmp_path / "one").cells()
    two = api.open_run(tmp_path / "two").cells()
    assert set(two.path) <= {"svd", "plain-fallback"}
    pd.testing.assert_frame_equal(without_times(one), without_times(two))


def test_shared_polynomial_features_change_no_number(tmp_path):
    # reference library: scikit-learn PolynomialFeatures works row by row; tasks that take their
    # rows from features built once for all rows must give the numbers they give alone
    from gridplan.measuring import runner
    frame = linear_data(300, 3, 0.5, seed=4)
    frame.to_csv(tmp_path / "data.csv", index=False)
    spec = resolve(load_config(write_config(tmp_path, {
        "data": {"path": "data.csv", "target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 3, 6]},
                  "regularization": {"values": [1e-6, 0.1, 10.0]}},
        "sizes": {"count": 4, "smallest": 20}, "resampling": {"folds": 3}})))
    work = runner.workload_of(spec)
    tasks = runner.build_tasks(spec, set())
    shared = runner.with_shared_features(tasks, work)
    assert work.poly_features is None and shared.poly_features.shape == (300, 83)
    for task in tasks:
        alone, together = runner.run_task(task, work), runner.run_task(task, shared)
        assert [(r.train_error, r.validation_error, r.path) for r in alone] == \
            [(r.train_error, r.validation_error, r.path) for r in together]


def test_shared_polynomial_features_have_a_size_limit(tmp_path, monkeypatch):
    # common practice, no published source: a table too large to hold once is not built;
    # each task builds its own rows' features as before
    from gridplan.measuring import runner
    frame = linear_data(300, 3, 0.5, seed=4)
    frame.to_csv(tmp_path / "data.csv", index=False)
    spec = resolve(load_config(write_config(tmp_path, {
        "data": {"path": "data.csv", "target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 6]}},
        "sizes": {"count": 3, "smallest": 20}, "resampling": {"folds": 3}})))
    work, tasks = runner.workload_of(spec), runner.build_tasks(spec, set())
    monkeypatch.setattr(runner, "SHARED_FEATURES_MAX_BYTES", 300 * 83 * 8)
    assert runner.with_shared_features(tasks, work).poly_features.shape == (300, 83)
    monkeypatch.setattr(runner, "SHARED_FEATURES_MAX_BYTES", 300 * 83 * 8 - 1)
    assert runner.with_shared_features(tasks, work).poly_features is None


def test_threaded_tasks_are_probed_side_by_side_and_kept(tmp_path, monkeypatch):
    # common practice, no published source: with two workers the estimate times two ridge tasks
    # at the largest size at once (no idle core), and `run` stores both instead of refitting them
    from typer.testing import CliRunner

    from gridplan.cli import app
    from gridplan.measuring import runner
    frame = linear_data(300, 2, 0.3, seed=5)
    frame.to_csv(tmp_path / "data.csv", index=False)
    config = load_config(write_config(tmp_path, {
        "data": {"path": "data.csv", "target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 2, 3]},
                  "regularization": {"values": [0.1, 10.0]}},
        "sizes": {"values": [30, 90, 200]}, "resampling": {"folds": 3, "seed": 2}}))
    spec = resolve(config)
    estimate = runner.estimate_seconds(spec, jobs=2)
    assert estimate.probe_tasks == 2
    assert {r.size_index for r in estimate.rows} == {2} and len({r.fold for r in estimate.rows}) == 2
    tasks = runner.build_tasks(spec, set())
    assert estimate.seconds == pytest.approx(
        estimate.probe_seconds * len(tasks) * np.mean([30, 90, 200]) / 200 / 2)
    calls = []
    real = runner.run_task

    def counted(task, work):
        calls.append(task)
        return real(task, work)

    monkeypatch.setattr(runner, "run_task", counted)
    result = CliRunner().invoke(app, ["run", str(config.source), "--out", str(tmp_path / "cli"),
                                      "--jobs", "2"])
    assert result.exit_code == 0, result.output
    assert "2 tasks at the largest size, side by side, took" in result.output
    assert len(calls) == len(set(calls)) == len(tasks)
    via_cli = without_times(api.open_run(tmp_path / "cli").cells())
    api.run(config, out=tmp_path / "api", jobs=1)
    pd.testing.assert_frame_equal(via_cli, without_times(api.open_run(tmp_path / "api").cells()))


def test_the_command_keeps_its_estimate_probe_instead_of_fitting_it_twice(tmp_path, monkeypatch):
    # The estimate line times one task; `run` stores that task's rows and fits every other task once.
    from typer.testing import CliRunner

    from gridplan.cli import app
    from gridplan.measuring import runner
    config = _resume_config(tmp_path)
    calls = []
    real = runner.run_task

    def counted(task, work):
        calls.append(task)
        return real(task, work)

    monkeypatch.setattr(runner, "run_task", counted)
    result = CliRunner().invoke(app, ["run", str(config.source), "--out", str(tmp_path / "cli"),
                                      "--jobs", "1", "--quiet"])
    assert result.exit_code == 0, result.output
    spec = resolve(config)
    assert len(calls) == len(set(calls)) == len(runner.build_tasks(spec, set()))
    via_cli = without_times(api.open_run(tmp_path / "cli").cells())
    api.run(config, out=tmp_path / "api", jobs=1)
    pd.testing.assert_frame_equal(via_cli, without_times(api.open_run(tmp_path / "api").cells()))


def test_a_run_is_read_once_per_state_of_its_store(tmp_path, monkeypatch):
    # common practice, no published source: one command asks for a run's cells several times; the
    # store is read again only after it changed, and callers get copies they may change freely
    import sqlite3

    from gridplan.measuring.store import STORE_NAME, Store
    config = _resume_config(tmp_path)
    api.run(config, out=tmp_path / "run", jobs=1)
    reads = []
    real = Store.cells

    def counted(self):
        reads.append(1)
        return real(self)

    monkeypatch.setattr(Store, "cells", counted)
    run = api.open_run(tmp_path / "run")
    first = run.cells()
    first["validation_error"] = -1.0                       # the caller's copy only
    second = api.open_run(tmp_path / "run").cells()
    assert len(reads) == 1 and (second["validation_error"] >= 0).all()
    with sqlite3.connect(tmp_path / "run" / STORE_NAME) as connection:
        connection.execute("DELETE FROM folds WHERE size_index = 0")
    third = run.cells()
    assert len(reads) == 2 and len(third) == len(second) - (second["train_size"] == 20).sum()
