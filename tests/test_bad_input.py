"""Bad configs and bad data: one clear sentence naming the problem, exit code 1."""

from __future__ import annotations

import numpy as np
import pytest
from typer.testing import CliRunner

from gridplan.cli import app
from tests.helpers import linear_data, write_config

runner = CliRunner()

BASE = {
    "data": {"path": "data.csv", "target": "y"},
    "model": {"family": "poly-ridge", "capacity": {"values": [1, 2]},
              "regularization": {"values": [0.1, 1.0]}},
    "sizes": {"values": [20, 60]},
    "resampling": {"folds": 3},
    "goal": {"metric": "mse", "target": 0.3},
    "costs": {"per_sample": 1.0},
}


def _with(change: dict) -> dict:
    sections = {k: dict(v) for k, v in BASE.items()}
    for key, value in change.items():
        section, _, name = key.partition(".")
        if value is None:
            sections[section].pop(name, None)
        else:
            sections[section][name] = value
    return sections


def _check(tmp_path, sections=None, frame=None, text=None) -> str:
    (frame if frame is not None else linear_data(120, 2, 0.5, seed=0)).to_csv(
        tmp_path / "data.csv", index=False)
    path = tmp_path / "grid.toml"
    if text is not None:
        path.write_text(text)
    else:
        write_config(tmp_path, sections or BASE)
    result = runner.invoke(app, ["check", str(path)])
    assert result.exit_code == 1, result.output
    assert "Traceback" not in result.output
    message = result.output.strip()
    assert message.startswith("gridplan: ") and "\n" not in message, message
    return message


CONFIG_CASES = [
    ({"resampling.fold": 3}, "unknown key 'fold' (did you mean 'folds'?)"),
    ({"model.capacity": {"values": []}}, "[model] capacity.values is empty"),
    ({"model.capacity": {"values": [2, 1]}}, "must be sorted ascending"),
    ({"model.regularization": {"values": [1.0, 1.0]}}, "duplicated values"),
    ({"sizes.values": [0, 10]}, "positive whole numbers, got 0"),
    ({"sizes.values": [-5, 10]}, "positive whole numbers, got -5"),
    ({"sizes.values": [20, 500]}, "asks for 500 training rows, but a training fold holds only 80"),
    ({"resampling.folds": 1}, "[resampling] folds must be at least 2, got 1"),
    ({"resampling.folds": "five"}, "[resampling] folds must be a whole number, got 'five'"),
    ({"goal.target": 0.0}, "[goal] target must be a positive error"),
    ({"goal.target": -1.0}, "[goal] target must be a positive error"),
    ({"costs.per_sample": -2.0}, "[costs] per_sample must not be negative"),
    ({"goal.metric": "error_rate"}, "'error_rate' does not fit a regression task"),
    ({"goal.metric": "msqe"}, "'msqe' does not fit a regression task"),
    ({"model.capacity": {"param": "depth", "values": [1, 2]}},
     "'depth' is not a parameter of the poly-ridge family; it has alpha, degree"),
    ({"model.family": None, "model.estimator": "sklearn.ensemble.RandomForestRegressor",
      "model.capacity": {"param": "max_dept", "values": [2, 4]}, "model.regularization": None},
     "'max_dept' is not a parameter of sklearn.ensemble.RandomForestRegressor (did you mean 'max_depth'?)"),
    ({"model.family": None, "model.estimator": "sklearn.ensemble.RandomForestRegresor",
      "model.capacity": {"param": "max_depth", "values": [2, 4]}, "model.regularization": None}, "no estimator 'RandomForestRegresor' (did you mean 'RandomForestRegressor'?)"),
    ({"model.family": None, "model.estimator": "subprocess.Popen",
      "model.capacity": {"param": "bufsize", "values": [1, 2]}, "model.regularization": None},
     "outside scikit-learn"),
    ({"model.family": "forest"}, "[model] family must be one of poly-ridge, tree, got 'forest'"),
    ({"data.task": "regresion"}, "did you mean 'regression'?"),
    ({"data.path": "nowhere.csv"}, "data file"),
    ({"data.target": "price"}, "has no target column 'price'"),
    ({"model.regularization": {"values": [0.1, 1.0], "more": "bigger"}},
     '[model] regularization.more must be "larger" or "smaller"'),
    ({"model.capacity": {"features": [["x0"], ["x0", "x1"]], "more": "smaller"}},
     "feature sets are ordered by nesting; more does not apply"),
]


@pytest.mark.parametrize("change, expected", CONFIG_CASES)
def test_bad_config(tmp_path, change, expected):
    assert expected in _check(tmp_path, _with(change))


def test_missing_config_file(tmp_path):
    result = runner.invoke(app, ["check", str(tmp_path / "absent.toml")])
    assert result.exit_code == 1
    assert "config file" in result.output and "does not exist" in result.output


def test_config_that_is_not_toml_names_line_and_column(tmp_path):
    message = _check(tmp_path, text="[data]\npath = data.csv\n")
    assert "is not valid TOML" in message and "line 2" in message and "column" in message


def test_bad_data_cases(tmp_path):
    base = linear_data(120, 2, 0.5, seed=0)
    cases = []
    missing = base.copy()
    missing.loc[[3, 7, 9], "x0"] = np.nan
    missing.loc[[5], "x1"] = np.nan
    cases.append((missing, _with({}), "missing feature values in x0 (3), x1 (1)"))
    no_target = base.copy()
    no_target["y"] = np.nan
    cases.append((no_target, _with({}), "target column 'y' is entirely missing"))
    text_target = base.copy()
    text_target["y"] = ["high", "low"] * 60
    cases.append((text_target, _with({}), "is not numeric, but the task is regression"))
    one_class = base.copy()
    one_class["y"] = "same"
    cases.append((one_class, _with({"data.task": "classification", "goal.metric": "error_rate"}),
                  "has a single class"))
    rare = base.copy()
    rare["y"] = ["a"] * 118 + ["b"] * 2
    cases.append((rare, _with({"data.task": "classification", "goal.metric": "error_rate"}),
                  "class 'b' of 'y' has only 2 rows, fewer than the 3 folds"))
    constant = base.copy()
    constant["y"] = 1.5
    cases.append((constant, _with({}), "the target column 'y' is constant (every value is 1.5)"))
    tiny = base.head(5)
    cases.append((tiny, _with({}), "too few for 3 folds"))
    for frame, sections, expected in cases:
        assert expected in _check(tmp_path, sections, frame), expected


def test_empty_and_headless_files(tmp_path):
    write_config(tmp_path, BASE)
    (tmp_path / "data.csv").write_text("")
    result = runner.invoke(app, ["check", str(tmp_path / "grid.toml")])
    assert result.exit_code == 1 and "is empty" in result.output
    (tmp_path / "data.csv").write_text("x0,x1,y\n")
    result = runner.invoke(app, ["check", str(tmp_path / "grid.toml")])
    assert result.exit_code == 1 and "has a header but no rows" in result.output


def test_duplicate_column_names(tmp_path):
    write_config(tmp_path, BASE)
    (tmp_path / "data.csv").write_text("x0,x0,y\n1,2,3\n")
    result = runner.invoke(app, ["check", str(tmp_path / "grid.toml")])
    assert result.exit_code == 1 and "duplicate column names: x0" in result.output


def test_unreadable_parquet(tmp_path):
    sections = _with({"data.path": "data.parquet"})
    write_config(tmp_path, sections)
    (tmp_path / "data.parquet").write_bytes(b"this is not parquet at all")
    result = runner.invoke(app, ["check", str(tmp_path / "grid.toml")])
    assert result.exit_code == 1 and "data.parquet cannot be read" in result.output


def test_constant_feature_is_a_warning_not_an_error(tmp_path):
    frame = linear_data(120, 2, 0.5, seed=0)
    frame["flat"] = 4.0
    frame.to_csv(tmp_path / "data.csv", index=False)
    write_config(tmp_path, BASE)
    result = runner.invoke(app, ["check", str(tmp_path / "grid.toml")])
    assert result.exit_code == 0, result.output
    assert "warning: data.csv: column 'flat' is constant" in result.output


def test_missing_values_can_be_imputed_on_request(tmp_path):
    frame = linear_data(120, 2, 0.5, seed=0)
    frame.loc[[3, 7], "x0"] = np.nan
    frame.to_csv(tmp_path / "data.csv", index=False)
    write_config(tmp_path, _with({"data.missing": "impute"}))
    result = runner.invoke(app, ["run", str(tmp_path / "grid.toml"), "--out",
                                 str(tmp_path / "r"), "-q", "-j", "1", "--yes"])
    assert result.exit_code == 0, result.output
    from gridplan.api import open_run
    cells = open_run(tmp_path / "r").cells()
    assert (cells.status == "ok").all() and cells.validation_error.notna().all()


def test_diagnosis_thresholds_are_read_and_checked(tmp_path):
    from gridplan.measuring.config import load_config
    linear_data(120, 2, 0.5, seed=0).to_csv(tmp_path / "data.csv", index=False)
    sections = _with({})
    sections["diagnosis"] = {"floor_margin": 0.1, "min_share": 0.3}
    config = load_config(write_config(tmp_path, sections))
    assert config.thresholds == {"floor_margin": 0.1, "min_share": 0.3}
    sections["diagnosis"] = {"alpha": 1.5}
    assert "[diagnosis] alpha is out of range" in _check(tmp_path, sections)


# -- round 2: hostile inputs a new user tried -------------------------------

LIMIT_CASES = [
    ({"resampling.repeats": 1_000_000_000},
     "asks for 24,000,000,000 fits (4 settings x 2 sizes x 3 folds x 1,000,000,000 repeats), "
     "above the limit of 2,000,000"),
    ({"sizes.values": None, "sizes.count": 1_000_000_000},
     "[sizes] count must lie between 1 and 100, got 1,000,000,000"),
    ({"resampling.seed": 2 ** 32}, "[resampling] seed must lie between 0 and 4,294,967,295"),
    ({"resampling.seed": -1}, "[resampling] seed must lie between 0 and 4,294,967,295"),
    ({"resampling.seed": 2 ** 63 - 1}, "got 9,223,372,036,854,775,807"),
    ({"run.jobs": 10 ** 9}, "[run] jobs must be -1 (all cores) or a count from 1 to 1,024"),
    ({"run.fit_time_limit": 1e300}, "[run] fit_time_limit must be positive seconds up to 1,000,000"),
    ({"model.regularization": {"values": [float(v) for v in range(1, 2002)]}},
     "[model] regularization.values holds 2,001 values, more than the 1,000 an axis may have"),
    ({"model.family": None, "model.estimator": "sklearn.neighbors.KNeighborsRegressor",
      "model.capacity": {"param": "n_neighbors", "values": list(range(1, 201))},
      "model.regularization": {"param": "leaf_size", "values": list(range(1, 201))}},
     "the grid has 40,000 settings (200 capacity x 200 regularization values), more than the "
     "20,000"),
    ({"run.max_fits": 0}, "[run] max_fits must be positive"),
]


@pytest.mark.parametrize("change, expected", LIMIT_CASES)
def test_grids_beyond_the_limits_are_refused_before_any_work(tmp_path, change, expected):
    sections = _with({k: v for k, v in change.items() if not k.startswith("run.")})
    for key, value in change.items():
        if key.startswith("run."):
            sections.setdefault("run", {})[key[4:]] = value
    assert expected in _check(tmp_path, sections)


def test_an_axis_of_two_million_values_is_refused_at_once(tmp_path):
    values = ", ".join(str(i) for i in range(1, 2_000_001))
    text = ("[data]\npath = \"data.csv\"\ntarget = \"y\"\n[model]\nfamily = \"tree\"\n"
            f"[model.capacity]\nvalues = [{values}]\n")
    assert "holds 2,000,000 values, more than the 1,000" in _check(tmp_path, text=text)


def test_max_fits_can_be_raised_explicitly(tmp_path):
    from gridplan.measuring.config import load_config
    linear_data(120, 2, 0.5, seed=0).to_csv(tmp_path / "data.csv", index=False)
    sections = _with({"resampling.repeats": 2})
    sections["run"] = {"max_fits": 40}
    assert "above the limit of 40" in _check(tmp_path, sections)
    sections["run"] = {"max_fits": 48}   # 4 settings x 2 sizes x 3 folds x 2 repeats
    assert load_config(write_config(tmp_path, sections)).max_fits == 48


def test_a_polynomial_expansion_beyond_memory_is_refused_with_its_size(tmp_path):
    frame = linear_data(120, 40, 0.5, seed=0)
    # comb(40 + 12, 12) - 1 polynomial features of 40 columns at degree 12
    message = _check(tmp_path, _with({"model.capacity": {"values": [1, 12]}}), frame)
    assert "degree 12 on these columns makes 206,379,406,869 polynomial features" in message
    assert "of memory available" in message


def test_infinite_feature_values_name_the_column_and_count(tmp_path):
    frame = linear_data(120, 2, 0.5, seed=0)
    frame.loc[[1, 4], "x1"] = np.inf
    frame.loc[[2], "x0"] = -np.inf
    for sections in (_with({}), _with({"data.missing": "impute"})):
        message = _check(tmp_path, sections, frame)
        assert "infinite feature values in x0 (1), x1 (2)" in message


def test_nul_bytes_in_paths_and_run_names_are_one_sentence(tmp_path):
    assert "[data] path contains a NUL byte" in _check(tmp_path, _with({"data.path": "da\0ta.csv"}))
    sections = _with({})
    sections["run"] = {"name": "a\0b"}
    assert "[run] name must hold printable characters only" in _check(tmp_path, sections)
    # A shell cannot pass a NUL in an argument; from Python, the CLI's parser
    # refuses it as a usage error naming the argument.
    result = runner.invoke(app, ["check", str(tmp_path / "gr\0id.toml")])
    assert result.exit_code == 2 and "Invalid value for 'config'" in result.output
    assert "null byte" in result.output and "Traceback" not in result.output
    from gridplan import api
    from gridplan.common.errors import GridplanError
    with pytest.raises(GridplanError, match="run folder path .* contains a NUL byte"):
        api.open_run(tmp_path / "r\0un")


@pytest.mark.parametrize("name", ["two\nlines", "bell\x07", "tab\there", "evil\u202etxt.csv",
                                  "zero\u200bwidth"])
def test_run_names_with_control_or_bidi_characters_are_refused(tmp_path, name):
    sections = _with({})
    sections["run"] = {"name": name}
    message = _check(tmp_path, sections)
    assert "[run] name must hold printable characters only" in message
    assert f"U+{ord(next(c for c in name if not c.isprintable())):04X}" in message


def test_data_paths_that_are_not_regular_files_say_what_they_are(tmp_path):
    import os
    (tmp_path / "folder.csv").mkdir()
    os.mkfifo(tmp_path / "pipe.csv")
    cases = [("folder.csv", "is a directory, not a regular file"),
             ("pipe.csv", "is a named pipe (FIFO), not a regular file"),
             ("/dev/zero", "is a device, not a regular file")]
    for path, expected in cases:
        message = _check(tmp_path, _with({"data.path": path}))
        assert expected in message and "does not exist" not in message
    result = runner.invoke(app, ["check", str(tmp_path / "folder.csv")])
    assert result.exit_code == 1 and "config file" in result.output
    assert "is a directory, not a regular file" in result.output


def test_the_other_spelling_of_regularization_is_accepted_as_an_alias(tmp_path):
    from gridplan.measuring.config import load_config
    linear_data(120, 2, 0.5, seed=0).to_csv(tmp_path / "data.csv", index=False)
    sections = _with({"model.regularization": None})
    sections["model"]["regularisation"] = {"values": [0.1, 1.0]}
    sections["costs"] = {"regularisation_step": 7.0}
    config = load_config(write_config(tmp_path, sections))
    assert config.regularization.values == (0.1, 1.0)
    assert config.costs.regularization_step == 7.0
    sections["model"]["regularization"] = {"values": [0.1, 1.0]}
    assert "has both regularization and regularisation" in _check(tmp_path, sections)


def test_a_huge_tree_depth_is_quick_and_equals_the_full_tree(tmp_path):
    # A depth limit far beyond any tree's depth reads the full tree, without walking
    # 9e18 levels (it once hung `check`).
    from gridplan.api import check as check_config
    from gridplan.api import open_run, run
    from gridplan.measuring.config import load_config
    frame = linear_data(200, 2, 0.5, seed=4)
    frame.to_csv(tmp_path / "data.csv", index=False)
    sections = _with({"model.family": "tree", "model.regularization": None,
                      "model.capacity": {"values": [40, 9_000_000_000_000_000_000]}})
    config = load_config(write_config(tmp_path, sections))
    check_config(config)
    cells = open_run(run(config, out=tmp_path / "run", jobs=1)).cells()
    deep, huge = (cells[cells.capacity_index == i].sort_values(["train_size", "fold"])
                  for i in (0, 1))
    np.testing.assert_array_equal(deep.validation_error.to_numpy(), huge.validation_error.to_numpy())


def test_bootstrap_counts_out_of_range_are_one_sentence(tmp_path):
    from tests.helpers import run_frame
    run_dir, _ = run_frame(tmp_path, linear_data(120, 2, 0.5, seed=0), {
        "data": {"target": "y"}, "model": BASE["model"],
        "sizes": {"values": [10, 20, 40, 80]}, "resampling": {"folds": 3},
        "goal": {"target": 0.3}})
    for boot in ("1", "100000000"):
        result = runner.invoke(app, ["advise", str(run_dir), "--boot", boot])
        assert result.exit_code == 1 and "Traceback" not in result.output
        assert "the bootstrap takes 2 to 10,000 resamples per curve" in result.output


def test_one_confidence_rule_everywhere(tmp_path):
    # common practice, no published source: bands below even odds are refused alike
    # by the library, the curves and the advice (the rule lives in gridplan.common.checks).
    from gridplan.common.checks import check_confidence
    from gridplan.common.errors import GridplanError
    from gridplan.deciding.advisor import _resolve_confidence
    from gridplan.showing.figures import _confidence_default
    for check in (check_confidence, lambda v: _resolve_confidence(v, None),
                  lambda v: _confidence_default(None, v)):
        assert check(0.9) == 0.9 and check(0.5) == 0.5
        for bad in (0.3, 1.0, True, "0.9"):
            with pytest.raises(GridplanError, match=r"must lie in \[0.5, 1\)"):
                check(bad)


def test_errors_say_what_kind_of_problem_they_are(tmp_path):
    # One base for the CLI to catch; bad input is also a ValueError for library callers.
    from gridplan import api
    from gridplan.common.errors import ClusterError, GridplanError, InputError, NumericalError
    assert issubclass(InputError, ValueError) and issubclass(InputError, GridplanError)
    assert issubclass(NumericalError, GridplanError) and issubclass(ClusterError, GridplanError)
    (tmp_path / "bad.toml").write_text('[data]\npath = "x.csv"\ntarget = "y"\n[model]\n'
                                       'family = "poly-ridge"\ncapacity = { values = [1] }\n'
                                       '[goal]\nconfidence = 0.2\n', encoding="utf-8")
    with pytest.raises(ValueError, match=r"\[goal\] confidence must lie in \[0.5, 1\)"):
        api.load_config(tmp_path / "bad.toml")
    from gridplan.deciding.curves import fit_setting
    with pytest.raises(InputError, match="the bootstrap takes 2 to"):
        fit_setting([10, 20, 40], [[1.0, 1.1], [0.9, 0.8], [0.7, 0.75]], n_boot=1)
