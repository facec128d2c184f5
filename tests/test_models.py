"""Several [[model]] tables in one run: config, store, export, floor across models, switching."""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from gridplan import api
from gridplan.common.errors import GridplanError
from gridplan.deciding.advisor import advise
from gridplan.measuring.config import load_config
from gridplan.measuring.store import STORE_NAME, Store
from gridplan.showing.text import render_advice

SIGMA2 = 4.0          # the scenario's noise variance: the best reachable MSE
TARGET = 4.4

SMOOTH = """
[[model]]
name = "smooth"
family = "poly-ridge"
capacity = { param = "degree", values = [1, 2, 3, 4] }
regularization = { param = "alpha", values = [0.001, 1.0] }
"""
TREES = """
[[model]]
name = "trees"
family = "tree"
capacity = { param = "max_depth", values = [2, 4, 6, 8] }
regularization = { param = "min_samples_leaf", values = [1, 10] }
"""
REST = f"""
[sizes]
count = 6
smallest = 40

[goal]
target = {TARGET}

[costs]
switch_model = 300
max_samples = 20000
"""


def _field_data(n: int, seed: int) -> pd.DataFrame:
    """A smooth (quadratic) response in two inputs plus N(0, SIGMA2) noise."""
    rng = np.random.default_rng(seed)
    x1, x2 = rng.uniform(-2, 2, n), rng.uniform(-2, 2, n)
    y = 3 + 2 * x1 - 1.5 * x2 + 1.2 * x1 ** 2 + 0.8 * x1 * x2 + rng.normal(scale=SIGMA2 ** 0.5, size=n)
    return pd.DataFrame({"x1": x1, "x2": x2, "y": y})


def _config(folder, models: str, name: str) -> str:
    path = folder / name
    path.write_text(f'[data]\npath = "data.csv"\ntarget = "y"\n{models}{REST}', encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """The same 1,500 rows measured by a two-model run and by a tree-only run."""
    folder = tmp_path_factory.mktemp("models")
    _field_data(1500, seed=3).to_csv(folder / "data.csv", index=False)
    both = api.run(str(_config(folder, SMOOTH + TREES, "both.toml")), out=folder / "both", jobs=2)
    trees_only = TREES.replace("[[model]]", "[model]").replace('name = "trees"\n', "")
    alone = api.run(str(_config(folder, trees_only, "trees.toml")), out=folder / "trees", jobs=2)
    return folder, both, alone


def test_two_models_find_the_floor_within_its_band_and_plan_through_the_smooth_one(runs):
    # Regression with N(0, sigma^2) label noise: the best reachable mean squared
    # error is sigma^2 (standard result, e.g. the bias-variance decomposition of
    # squared error). The quadratic model reaches it; trees on a smooth target
    # stay far above at 1,500 rows.
    _, both, _ = runs
    advice = advise(both, model="trees")        # the user stands at the tree model
    low, high = advice["noise_floor_band"]
    assert low <= SIGMA2 <= high
    assert advice["noise_floor_model"] == "smooth"
    assert advice["operating_point"]["model"] == "trees"
    assert advice["reachable"]
    first = advice["plan"][0]
    assert first["action"] == "switch-model" and first["cost"] == 300
    assert first["to"]["model"] == "smooth" and first["from"]["model"] == "trees"
    assert all(step["to"]["model"] == "smooth" for step in advice["plan"])
    assert advice["plan"][-1]["to"]["interval"][1] <= TARGET
    assert advice["plan_cost"] == pytest.approx(300 + next(
        m["plan_cost"] for m in advice["models"] if m["name"] == "smooth"))
    assert advice["headline"].startswith("Switch to model smooth with degree ")
    assert [m["name"] for m in advice["models"]] == ["smooth", "trees"]
    trees = advice["models"][1]
    assert not trees["reachable"] and trees["plateau"] is not None
    # the ranked moves offer the switch beside the tree model's own moves
    switches = [a for a in advice["actions"] if a["action"] == "switch-model"]
    assert len(switches) == 1 and switches[0]["plan_cost"] == advice["plan_cost"]
    assert advice["actions"][0]["action"] == "switch-model"
    text = render_advice(advice)
    assert "Operating point: model trees" in text and "switch-model" in text


def test_without_a_model_the_advice_stands_at_the_best_measured_one(runs):
    _, both, _ = runs
    advice = advise(both)
    assert advice["operating_point"]["model"] == "smooth"
    assert advice["reachable"]
    assert all(step["action"] != "switch-model" for step in advice["plan"])
    # a free switch to a model that cannot reach the target is ranked, not taken
    free = advise(both, model="smooth", switch_model=0)
    assert not any(step["action"] == "switch-model" for step in free["plan"])
    ranked = [a for a in free["actions"] if a["action"] == "switch-model"]
    assert len(ranked) == 1 and not ranked[0]["reachable"] and ranked[0]["to"]["model"] == "trees"
    # the only reachable way is taken whatever it costs, and the cost says so
    dear = advise(both, model="trees", switch_model=1e9)
    assert dear["plan"][0]["action"] == "switch-model" and dear["plan_cost"] >= 1e9


def test_tree_only_run_is_not_told_the_floor_blocks_it(runs):
    # Same rows, trees only: the trees level off far above sigma^2 with a large,
    # significant gap between training and validation error. Their plateau is
    # the trees' own limit, not the data's floor.
    _, _, alone = runs
    advice = advise(alone)
    assert advice["noise_floor"] is None and advice["noise_floor_band"] is None
    assert advice["binding_limit"] != "noise floor"
    assert "only new information" not in advice["headline"]
    assert "only new information" not in (advice["binding_detail"] or "")
    assert advice["plateau"] is not None


def test_export_store_and_views_carry_the_model(runs, tmp_path):
    folder, both, _ = runs
    rows = api.export_cells(both, tmp_path / "cells.csv")
    cells = pd.read_csv(tmp_path / "cells.csv")
    assert rows == len(cells) == 2 * 4 * 2 * 6 * 5
    assert list(cells.columns[:3]) == ["model", "capacity", "regularization"]
    assert cells.groupby("model").size().to_dict() == {"smooth": 240, "trees": 240}
    assert set(cells[cells.model == "trees"].capacity) == {2, 4, 6, 8}
    run = api.open_run(both, model="trees")
    assert run.model_names == ["smooth", "trees"]
    assert run.meta["capacity_param"] == "max_depth" and run.meta["family"] == "tree"
    assert [label for label, _ in run.axes["capacity"]] == ["2", "4", "6", "8"]
    with pytest.raises(GridplanError, match="'forest' is not a model of this run; it has smooth, trees"):
        api.open_run(both, model="forest")
    curves = api.curves_report(both, model="trees")
    assert curves["model"] == "trees" and len(curves["settings"]) == 8


def test_cli_names_every_model(runs):
    folder, both, _ = runs
    check = subprocess.run([sys.executable, "-m", "gridplan", "check", str(folder / "both.toml")],
                           capture_output=True, text=True, cwd=folder)
    assert check.returncode == 0
    assert "smooth: poly-ridge" in check.stdout and "trees: tree" in check.stdout
    assert "96 cells (16 settings x 6 sizes), 480 fits" in check.stdout
    shown = subprocess.run([sys.executable, "-m", "gridplan", "advise", str(both), "--model",
                            "trees", "--json"], capture_output=True, text=True, cwd=folder)
    assert shown.returncode == 0
    assert json.loads(shown.stdout)["plan"][0]["action"] == "switch-model"
    bad = subprocess.run([sys.executable, "-m", "gridplan", "curves", str(both), "--model", "x"],
                         capture_output=True, text=True, cwd=folder)
    assert bad.returncode == 1 and "Traceback" not in bad.stderr
    assert "'x' is not a model of this run" in bad.stderr


def test_a_second_run_resumes_every_model(runs):
    folder, both, _ = runs
    with Store.open_existing(both, model=1) as store:
        before = len(store.finished_keys())
    api.run(str(folder / "both.toml"), out=both, jobs=1)       # nothing left to do
    with Store.open_existing(both, model=1) as store:
        assert len(store.finished_keys()) == before == 240


@pytest.mark.parametrize("models, message", [
    (SMOOTH + TREES.replace('name = "trees"\n', ""), "[model 2] name is missing"),
    (SMOOTH + SMOOTH, "two [[model]] tables are named 'smooth'"),
    (SMOOTH.replace('"smooth"', '"my model"'), "name must be 1 to 40 letters"),
    (SMOOTH + TREES.replace("max_depth", "depth"), "[model 2] capacity.param 'depth' is not a "
                                                   "parameter of the tree family"),
])
def test_bad_model_tables_get_one_sentence(tmp_path, models, message):
    _field_data(50, 0).to_csv(tmp_path / "data.csv", index=False)
    with pytest.raises(GridplanError) as caught:
        load_config(_config(tmp_path, models, "bad.toml"))
    assert message in str(caught.value)


def test_a_store_written_before_models_opens_as_model_zero(tmp_path):
    # A store of the earlier layout: its folds table has no model_index column.
    path = tmp_path / STORE_NAME
    connection = sqlite3.connect(path)
    connection.executescript("""
        CREATE TABLE folds (capacity_index INTEGER NOT NULL, regularization_index INTEGER NOT NULL,
            size_index INTEGER NOT NULL, repeat INTEGER NOT NULL, fold INTEGER NOT NULL,
            train_size INTEGER NOT NULL, train_error REAL, validation_error REAL,
            fit_seconds REAL NOT NULL, status TEXT NOT NULL, path TEXT NOT NULL, message TEXT NOT NULL,
            PRIMARY KEY (capacity_index, regularization_index, size_index, repeat, fold));
        INSERT INTO folds VALUES (0, 0, 0, 0, 0, 20, 0.5, 0.7, 0.01, 'ok', 'svd', '');
        INSERT INTO folds VALUES (0, 0, 0, 0, 1, 20, 0.4, 0.8, 0.01, 'ok', 'svd', '');
    """)
    connection.commit()
    connection.close()
    with Store(path) as store:
        store.set_axes({"capacity": [("1", 1)], "regularization": [("none", None)]})
        store.set_meta({"model": "poly-ridge"})
        cells = store.cells()
        assert store.finished_keys() == {(0, 0, 0, 0, 0), (0, 0, 0, 0, 1)}
    assert cells["validation_error"].tolist() == [0.7, 0.8]
    assert (cells["model_index"] == 0).all() and (cells["model"] == "poly-ridge").all()


def test_report_compares_the_models_with_the_advice_numbers(runs, tmp_path):
    from gridplan.showing.report import write_report
    _, both, _ = runs
    path = write_report(both, tmp_path / "view.html", model="trees")
    text = path.read_text(encoding="utf-8")
    advice = advise(both, model="trees")
    assert 'id="models"' in text and "Models compared" in text
    assert f'data-value="{advice["plan_cost"]!r}"' in text or \
        f'data-value="{advice["plan_cost"]}"' in text
    assert "model smooth: degree" in text           # the switched-to state names its model
    assert advice["headline"] in text


def test_advice_is_one_typed_object_for_json_text_and_report(runs):
    from gridplan.common.results import Advice, Move, PlanStep
    _, both, _ = runs
    advice = advise(both, model="trees")
    assert isinstance(advice, Advice) and isinstance(advice.plan[0], PlanStep)
    assert all(isinstance(move, Move) for move in advice.actions)
    assert advice["plan"][0]["from"]["model"] == advice.plan[0].from_.model == "trees"
    data = advice.to_dict()
    assert list(data) == Advice.json_keys()                    # the JSON keys are the fields
    text = json.dumps(data)                                    # plain JSON values throughout
    again = Advice.from_dict(json.loads(text))
    assert again == advice
    with pytest.raises(ValueError, match="unknown keys \\['extra'\\]"):
        Advice.from_dict({**data, "extra": 1})
    with pytest.raises(ValueError, match="missing keys \\['plan'\\]"):
        Advice.from_dict({k: v for k, v in data.items() if k != "plan"})


def test_backtest_checks_every_model(runs):
    from gridplan.backtest import backtest
    from gridplan.showing.text import render_backtest
    folder, _, _ = runs
    result = backtest(load_config(folder / "both.toml"), fraction=0.25, out=folder / "bt",
                      jobs=2, n_boot=30)
    assert result.models == ["smooth", "trees"]
    assert {r.model for r in result.rows} == {"smooth", "trees"}
    assert len([r for r in result.rows if r.model == "trees"]) == 8
    assert set(result.calibrations) == {"smooth", "trees"}
    inside = np.mean([r.low <= r.measured <= r.high for r in result.rows])
    assert result.coverage == pytest.approx(inside)
    text = render_backtest(result)
    assert "model smooth" in text and "model trees" in text
