"""The command line: check, run, export, demo; exit codes and one-sentence errors."""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pandas as pd
from typer.testing import CliRunner

from gridplan.cli import app
from tests.helpers import linear_data, write_config

runner = CliRunner()


def _small_config(tmp_path, **model):
    frame = linear_data(200, 2, 0.4, seed=6)
    frame["site"] = np.random.default_rng(1).choice(["east", "west"], size=len(frame))
    frame.to_parquet(tmp_path / "data.parquet")
    return write_config(tmp_path, {
        "data": {"path": "data.parquet", "target": "y"},
        "model": model or {"family": "poly-ridge", "capacity": {"values": [1, 2]},
                           "regularization": {"values": [0.1, 10.0]}},
        "sizes": {"count": 3, "smallest": 20}, "resampling": {"folds": 3, "seed": 1}})


def test_check_prints_the_grid(tmp_path):
    config = _small_config(tmp_path)
    result = runner.invoke(app, ["check", str(config), "--out", str(tmp_path / "r")])
    assert result.exit_code == 0, result.output
    assert "12 cells (4 settings x 3 sizes), 36 fits" in result.output
    assert "1 categorical" in result.output
    assert str(tmp_path / "r") in result.output


def test_run_then_export_has_the_contract_columns(tmp_path):
    config = _small_config(tmp_path)
    result = runner.invoke(app, ["run", str(config), "--out", str(tmp_path / "r"), "--yes",
                                 "-j", "1"])
    assert result.exit_code == 0, result.output
    assert "36 fits stored" in result.output
    out = tmp_path / "cells.csv"
    result = runner.invoke(app, ["export", str(tmp_path / "r"), "-o", str(out)])
    assert result.exit_code == 0, result.output
    cells = pd.read_csv(out)
    for column in ["capacity", "regularization", "train_size", "repeat", "fold",
                   "train_error", "validation_error", "fit_seconds", "status"]:
        assert column in cells.columns
    assert len(cells) == 36
    assert sorted(cells.train_size.unique()) == [20, 52, 133]  # geometric: 20, sqrt(20 * 133), 133
    # rerun resumes: nothing left to compute, same table
    again = runner.invoke(app, ["run", str(config), "--out", str(tmp_path / "r"), "--yes", "-q"])
    assert again.exit_code == 0
    assert "36 fits stored" in again.output
    # the time estimate of a finished run fits nothing
    told = runner.invoke(app, ["run", str(config), "--out", str(tmp_path / "r"), "--yes"])
    assert told.exit_code == 0 and "nothing left to run" in told.output


FEATURE_SETS = [["temp"], ["temp", "humidity"], ["temp", "humidity", "route"]]


def _write_feature_data(tmp_path, n: int) -> None:
    """Three groups of inputs, each carrying real signal, plus N(0, 0.09) noise."""
    rng = np.random.default_rng(3)
    frame = pd.DataFrame({"temp": rng.normal(size=n), "humidity": rng.normal(size=n),
                          "route": rng.choice(["r1", "r2", "r3"], size=n)})
    frame["y"] = (2 * frame.temp + frame.humidity + (frame.route == "r2") * 1.5
                  + rng.normal(scale=0.3, size=n))
    frame.to_csv(tmp_path / "d.csv", index=False)


def _feature_config(tmp_path, sections: dict):
    """Config of a degree-1 poly-ridge over the nested feature sets, plus the given sections."""
    return write_config(tmp_path, {
        "data": {"path": "d.csv", "target": "y"},
        "model": {"family": "poly-ridge", "params": {"degree": 1},
                  "capacity": {"features": FEATURE_SETS},
                  "regularization": {"values": [0.01]}},
        **sections})


def test_feature_set_capacity_axis(tmp_path):
    _write_feature_data(tmp_path, 300)
    config = _feature_config(tmp_path, {"sizes": {"values": [50, 200]}, "resampling": {"folds": 3}})
    result = runner.invoke(app, ["run", str(config), "--out", str(tmp_path / "r"), "-q", "-j", "1"])
    assert result.exit_code == 0, result.output
    from gridplan.api import open_run
    cells = open_run(tmp_path / "r").cells()
    assert list(dict.fromkeys(cells.capacity)) == ["temp", "+humidity", "+route"]
    val = cells[cells.train_size == 200].groupby("capacity_index").validation_error.mean()
    # each added group carries real signal, so validation error falls (known data model)
    assert val.is_monotonic_decreasing and val.iloc[2] < 0.2


def test_bad_config_gives_one_sentence_and_exit_1(tmp_path):
    config = _small_config(tmp_path)
    config.write_text(config.read_text().replace("folds = 3", "fold = 3"))
    result = runner.invoke(app, ["check", str(config)])
    assert result.exit_code == 1
    assert "unknown key 'fold' (did you mean 'folds'?)" in result.output
    assert "Traceback" not in result.output


def test_estimator_outside_sklearn_is_refused_without_opt_in(tmp_path):
    config = _small_config(tmp_path, estimator="os.system",
                           capacity={"param": "n", "values": [1]})
    result = runner.invoke(app, ["run", str(config), "--yes"])
    assert result.exit_code == 1
    assert "outside scikit-learn" in result.output


def test_export_of_a_folder_that_is_not_a_run(tmp_path):
    result = runner.invoke(app, ["export", str(tmp_path), "-o", str(tmp_path / "x.csv")])
    assert result.exit_code == 1
    assert "not a gridplan run folder" in result.output


def test_help_answers_without_heavy_imports():
    # `gridplan --help` must not import scikit-learn, pandas or matplotlib.
    code = ("import sys; from gridplan.cli import app; "
            "print(any(m in sys.modules for m in ('sklearn', 'pandas', 'matplotlib')))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def _quadratic_run(tmp_path):
    from tests.helpers import quadratic_data
    quadratic_data(400, 0.5, seed=3).to_csv(tmp_path / "q.csv", index=False)
    config = write_config(tmp_path, {
        "data": {"path": "q.csv", "target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 2, 3]},
                  "regularization": {"values": [0.01, 1.0]}},
        "sizes": {"count": 6, "smallest": 10}, "resampling": {"folds": 4, "seed": 2},
        "goal": {"metric": "mse", "target": 0.3},
        "costs": {"per_sample": 1.0, "capacity_step": 50.0, "max_samples": 5000},
        "diagnosis": {"min_share": 0.3}}, "q.toml")
    result = runner.invoke(app, ["run", str(config), "--out", str(tmp_path / "q"), "-q", "-j", "1"])
    assert result.exit_code == 0, result.output
    return tmp_path / "q"


def test_curves_advise_and_heatmap_commands(tmp_path):
    import json
    run_dir = _quadratic_run(tmp_path)
    result = runner.invoke(app, ["curves", str(run_dir), "--json", "--boot", "30"])
    assert result.exit_code == 0, result.output
    summary = json.loads(result.output)
    assert len(summary["settings"]) == 6
    for row in summary["settings"]:
        for key in ["capacity", "regularization", "family", "asymptote", "asymptote_low",
                    "asymptote_high", "samples_needed"]:
            assert key in row
        assert row["asymptote_low"] <= row["asymptote"] <= row["asymptote_high"]

    result = runner.invoke(app, ["advise", str(run_dir), "--json", "--boot", "30", "--at", "1,0.01"])
    assert result.exit_code == 0, result.output
    advice = json.loads(result.output)
    assert advice["thresholds"]["min_share"] == 0.3     # from the config's [diagnosis]
    assert advice["verdict"] in {"high-bias", "high-variance", "both", "noise-floor", "fine"}
    for key in ["noise_floor", "reachable", "binding_limit", "plan", "actions"]:
        assert key in advice
    # a straight line on quadratic data with sigma^2 = 0.25 < target 0.3: capacity first
    assert advice["verdict"] == "high-bias"
    assert advice["actions"][0]["action"] == "more-capacity"
    names = {a["action"] for a in advice["actions"]}
    assert names <= {"more-data", "more-capacity", "less-capacity", "more-regularization",
                     "less-regularization"}

    result = runner.invoke(app, ["heatmap", str(run_dir), "--show", "gap", "-o",
                                 str(tmp_path / "gap.svg")])
    assert result.exit_code == 0, result.output
    assert (tmp_path / "gap.svg").read_text().lstrip().startswith("<?xml")
    result = runner.invoke(app, ["advise", str(run_dir), "--at", "9,9"])
    assert result.exit_code == 1 and "Traceback" not in result.output


def test_report_command_writes_one_html_file(tmp_path):
    run_dir = _quadratic_run(tmp_path)
    result = runner.invoke(app, ["report", str(run_dir), "--boot", "20", "-o",
                                 str(tmp_path / "r.html")])
    assert result.exit_code == 0, result.output
    text = (tmp_path / "r.html").read_text()
    assert text.lstrip().lower().startswith("<!doctype html>")
    assert "<script" not in text.lower() and "http://" not in text and "https://" not in text


def test_feature_groups_are_priced_in_the_plan(tmp_path):
    import json
    _write_feature_data(tmp_path, 400)
    config = _feature_config(tmp_path, {
        "sizes": {"count": 5, "smallest": 20}, "resampling": {"folds": 4},
        "goal": {"target": 0.2},
        "costs": {"per_sample": 5.0, "capacity_step": 1.0,
                  "feature_groups": {"+humidity": 70.0, "+route": 130.0}}})
    assert runner.invoke(app, ["run", str(config), "--out", str(tmp_path / "r"), "-q"]).exit_code == 0
    result = runner.invoke(app, ["advise", str(tmp_path / "r"), "--at", "temp,0.01", "--json",
                                 "--boot", "20"])
    assert result.exit_code == 0, result.output
    advice = json.loads(result.output)
    # every group carries real signal (known data model): both must be bought,
    # each at its own price, and no amount of data replaces them
    assert [s["action"] for s in advice["plan"]] == ["more-capacity", "more-capacity"]
    assert [s["cost"] for s in advice["plan"]] == [70.0, 130.0]
    assert advice["plan_cost"] == 200.0


def test_long_grid_asks_before_starting(tmp_path, monkeypatch):
    import gridplan.cli as cli
    config = _small_config(tmp_path)
    monkeypatch.setattr(cli, "CONFIRM_ABOVE_SECONDS", 0.0)   # every grid counts as long
    monkeypatch.setattr(cli, "_on_terminal", lambda: True)
    refused = runner.invoke(app, ["run", str(config), "--out", str(tmp_path / "r")], input="n\n")
    assert refused.exit_code == 1 and "Start it?" in refused.output
    assert "estimate" in refused.output and "36 fits" in refused.output
    assert not (tmp_path / "r" / "store.sqlite").exists()
    accepted = runner.invoke(app, ["run", str(config), "--out", str(tmp_path / "r"), "-q"],
                             input="y\n")
    assert accepted.exit_code == 0 and "36 fits stored" in accepted.output
    skipped = runner.invoke(app, ["run", str(config), "--out", str(tmp_path / "r2"), "--yes", "-q"])
    assert skipped.exit_code == 0 and "Start it?" not in skipped.output


def test_every_command_and_function_uses_one_bootstrap_default():
    # common practice, no published source: advise, report, curves and the demo on one run must
    # give the same bands and plans, so they share one number of bootstrap resamples
    import inspect

    import typer.models

    from gridplan import api, backtest
    from gridplan.common.checks import DEFAULT_BOOT
    from gridplan.deciding import advisor, curves, gridfit
    from gridplan.showing import gather, report
    functions = [advisor.advise, api.fit_curves, api.curves_report, backtest.backtest,
                 gather.gather_inputs, report.write_report, gridfit.fit_grid, curves.fit_setting]
    for function in functions:
        assert inspect.signature(function).parameters["n_boot"].default == DEFAULT_BOOT, function
    commands = {c.callback.__name__: c.callback for c in app.registered_commands}
    for name in ("curves", "advise", "report", "backtest"):
        option = inspect.signature(commands[name]).parameters["boot"].default
        assert isinstance(option, typer.models.OptionInfo) and option.default == DEFAULT_BOOT, name


def test_ctrl_c_in_a_deciding_command_says_nothing_was_left_half_done(tmp_path, monkeypatch):
    # Only measuring commands have cells to resume; the others write whole files or none.
    from gridplan.deciding import advisor
    config = _small_config(tmp_path)
    assert runner.invoke(app, ["run", str(config), "--out", str(tmp_path / "r"), "--yes",
                               "-j", "1"]).exit_code == 0

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt
    monkeypatch.setattr(advisor, "advise", interrupted)
    result = runner.invoke(app, ["advise", str(tmp_path / "r")])
    assert result.exit_code == 130
    assert "interrupted; no file was left half written." in result.output
    assert "resume" not in result.output
