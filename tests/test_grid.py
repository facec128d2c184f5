"""The notebook face: gridplan.measure with estimator objects and data in memory."""

from __future__ import annotations

import os

import numpy as np
import pandas as pd
import pytest
from sklearn.linear_model import Ridge
from sklearn.model_selection import GroupKFold, cross_validate
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import PolynomialFeatures, StandardScaler
from sklearn.tree import DecisionTreeRegressor

import gridplan
from gridplan import api
from gridplan.common.errors import GridplanError
from gridplan.common.results import Advice
from tests.helpers import write_config


def _sites(n_sites: int = 30, per_site: int = 20, seed: int = 0):
    """Rows grouped by site (equal sizes), a smooth response plus a site effect and noise."""
    rng = np.random.default_rng(seed)
    n = n_sites * per_site
    X = pd.DataFrame({"a": rng.uniform(-2, 2, n), "b": rng.uniform(-2, 2, n)})
    sites = np.repeat(np.arange(n_sites), per_site)
    effect = rng.normal(0, 0.5, n_sites)[sites]
    y = 1 + X.a - 0.5 * X.b ** 2 + effect + rng.normal(0, 0.5, n)
    return X, y.to_numpy(), sites


PIPE = Pipeline([("poly", PolynomialFeatures(include_bias=False)), ("scale", StandardScaler()),
                 ("ridge", Ridge())])


@pytest.fixture(scope="module")
def grouped():
    X, y, sites = _sites()
    before = set(os.listdir("."))
    grid = gridplan.measure(PIPE, X, y, capacity=("poly__degree", [1, 2, 3]),
                            regularization=("ridge__alpha", [0.01, 1.0, 100.0]),
                            cv=GroupKFold(5), groups=sites, train_sizes=5, target=0.6)
    return grid, X, y, sites, before


def test_full_size_cells_equal_cross_validate_on_the_same_group_splits(grouped):
    # Reference: scikit-learn's cross_validate on the same GroupKFold splits. Equal
    # groups give equal training folds, so the largest size is each whole fold.
    grid, X, y, sites, _ = grouped
    cells = grid.cells
    full = cells.train_size.max()
    assert full == 480
    for degree in (1, 2, 3):
        for alpha in (0.01, 1.0, 100.0):
            model = PIPE.set_params(poly__degree=degree, ridge__alpha=alpha)
            ref = cross_validate(model, X, y, groups=sites, cv=GroupKFold(5),
                                 scoring="neg_mean_squared_error", return_train_score=True)
            mine = cells[(cells.capacity == degree) & (cells.regularization == alpha)
                         & (cells.train_size == full)].sort_values("fold")
            np.testing.assert_allclose(mine.validation_error, -ref["test_score"], rtol=1e-9)
            np.testing.assert_allclose(mine.train_error, -ref["train_score"], rtol=1e-9)


def test_grouped_folds_never_share_a_group_and_subsets_are_nested(grouped):
    grid, X, y, sites, _ = grouped
    from gridplan.grid import _folds
    folds = _folds(GroupKFold(5), X, y, sites, "regression", 1, 0)
    for fold in folds:
        assert not set(sites[fold.train]) & set(sites[fold.test])
        for small, large in zip((10, 50, 200), (50, 200, 480)):
            assert set(fold.train[:small]) <= set(fold.train[:large])


def test_an_in_memory_grid_writes_no_files_and_advises(grouped, tmp_path):
    grid, _, _, _, before = grouped
    assert set(os.listdir(".")) == before
    assert grid.run.run_dir is None
    advice = grid.advise()
    assert isinstance(advice, Advice) and advice.run_dir == "in memory"
    assert advice.target == 0.6 and advice.operating_point.model == "Pipeline"
    assert list(advice.to_dict()) == Advice.json_keys()
    assert grid.cells.capacity.dtype.kind in "if"           # numbers, not labels
    assert "gridplan grid" in grid._repr_html_()
    dear = grid.advise(costs={"per_sample": 50.0})
    assert dear.costs["per_sample"] == 50.0 == grid.advise(per_sample=50.0).costs["per_sample"]
    with pytest.raises(GridplanError, match="costs has unknown key 'per_row'"):
        grid.advise(costs={"per_row": 1})
    summary = grid.curves()
    assert len(summary.settings) == 9 and summary.model == "Pipeline"
    figure = grid.heatmap()
    assert figure.axes


def test_config_path_and_api_path_give_identical_tables(tmp_path):
    # The same estimator named in a config and handed over as an object.
    X, y, _ = _sites(20, 15, seed=4)
    frame = X.assign(y=y)
    frame.to_csv(tmp_path / "data.csv", index=False)
    config = write_config(tmp_path, {
        "data": {"path": "data.csv", "target": "y"},
        "model": {"estimator": "sklearn.tree.DecisionTreeRegressor",
                  "capacity": {"param": "max_depth", "values": [2, 4]},
                  "regularization": {"param": "min_samples_leaf", "values": [1, 5]}},
        "sizes": {"count": 4}, "resampling": {"folds": 4, "seed": 2}})
    run_dir = api.run(str(config), out=tmp_path / "run", jobs=1)
    from_config = api.open_run(run_dir).cells()
    grid = gridplan.measure(DecisionTreeRegressor(), X, y, capacity=("max_depth", [2, 4]),
                            regularization=("min_samples_leaf", [1, 5]), cv=4, seed=2,
                            train_sizes=4)
    from_api = grid.run.cells()
    assert len(from_config) == 2 * 2 * 4 * 4 and (from_config.status == "ok").all()
    keep = ["model", "capacity", "regularization", "train_size", "repeat", "fold",
            "train_error", "validation_error", "status"]
    pd.testing.assert_frame_equal(from_config[keep].reset_index(drop=True),
                                  from_api[keep].reset_index(drop=True))


def test_a_store_path_gives_a_resumable_run_folder(tmp_path):
    X, y, sites = _sites(10, 12)
    grid = gridplan.measure(PIPE, X, y, capacity=("poly__degree", [1, 2]), cv=3, train_sizes=3,
                            store=tmp_path / "kept")
    assert (tmp_path / "kept" / "store.sqlite").is_file()
    again = gridplan.open_run(tmp_path / "kept")
    assert isinstance(again, gridplan.Grid)
    pd.testing.assert_frame_equal(again.cells, grid.cells)


@pytest.mark.parametrize("kwargs, message", [
    ({"capacity": ("degree", [1, 2])}, "capacity parameter 'degree' is not a parameter of "
                                       "Pipeline (did you mean 'poly__degree'?)"),
    ({"capacity": ("poly__degree", [])}, "capacity 'poly__degree' has no values"),
    ({"capacity": "poly__degree"}, "capacity must be (parameter name, values)"),
    ({"capacity": ("poly__degree", [1]), "cv": 1}, "cv must be at least 2 folds"),
    ({"capacity": ("poly__degree", [1]), "groups": [1, 2]}, "groups must give one value per row"),
    ({"capacity": ("poly__degree", [1]), "time": np.arange(100), "cv": GroupKFold(3)},
     "time sets forward-in-time splits itself"),
    ({"capacity": ("poly__degree", [1]), "metric": "error_rate"}, "does not fit a regression task"),
    ({"capacity": ("poly__degree", [1]), "costs": {"per_row": 1}}, "costs has unknown key 'per_row'"),
])
def test_bad_arguments_get_one_sentence(kwargs, message):
    X, y, _ = _sites(10, 10)
    with pytest.raises(GridplanError) as caught:
        gridplan.measure(PIPE, X, y, **kwargs)
    assert message in str(caught.value)


def test_y_must_match_x():
    X, y, _ = _sites(10, 10)
    with pytest.raises(GridplanError, match="X has 100 rows, y has shape"):
        gridplan.measure(PIPE, X, y[:50], capacity=("poly__degree", [1]))


def test_public_names_load_lazily():
    import subprocess
    import sys
    out = subprocess.run([sys.executable, "-c", "import sys, gridplan; "
                          "print('sklearn' in sys.modules, 'pandas' in sys.modules); "
                          "print(gridplan.measure.__module__, sorted(gridplan.__all__))"],
                         capture_output=True, text=True, check=True).stdout.split("\n")
    assert out[0] == "False False"
    assert out[1].startswith("gridplan.grid")


def test_a_scorer_error_equals_the_scorers_own_value(grouped):
    # Reference: scikit-learn's own scorer through cross_validate; gridplan's error is
    # 1 - r2 (r2 is best at 1) and, for a negated loss, the loss itself.
    _, X, y, sites, _ = grouped
    for scoring, to_error in (("r2", lambda s: 1 - s), ("neg_mean_absolute_error", lambda s: -s)):
        grid = gridplan.measure(PIPE, X, y, capacity=("poly__degree", [2]),
                                regularization=("ridge__alpha", [1.0]), cv=GroupKFold(5),
                                groups=sites, train_sizes=[100, 480], scoring=scoring)
        cells = grid.cells
        full = cells[cells.train_size == 480].sort_values("fold")
        ref = cross_validate(PIPE.set_params(poly__degree=2, ridge__alpha=1.0), X, y,
                             groups=sites, cv=GroupKFold(5), scoring=scoring,
                             return_train_score=True)
        np.testing.assert_allclose(full.validation_error, to_error(ref["test_score"]), rtol=1e-9)
        np.testing.assert_allclose(full.train_error, to_error(ref["train_score"]), rtol=1e-9)
    from gridplan.common.metrics import metric_label
    assert metric_label("r2") == "1 - r2" and metric_label("neg_mean_absolute_error") == \
        "mean_absolute_error"


def test_a_scorer_in_a_config_is_accepted_and_a_wrong_name_refused(tmp_path):
    X, y, _ = _sites(10, 12)
    X.assign(y=y).to_csv(tmp_path / "data.csv", index=False)
    sections = {"data": {"path": "data.csv", "target": "y"},
                "model": {"family": "poly-ridge", "capacity": {"values": [1, 2]}},
                "sizes": {"count": 3}, "goal": {"metric": "r2"}}
    config = api.load_config(write_config(tmp_path, sections))
    cells = api.open_run(api.run(config, out=tmp_path / "run", jobs=1)).cells()
    assert (cells.path == "plain").all()       # no shortcut computes a scorer: plain fits
    assert (cells.validation_error > 0).all()
    sections["goal"] = {"metric": "r3"}
    with pytest.raises(GridplanError, match="'r3' does not fit a regression task; use one of "
                                            "mse, rmse, mae, or a scikit-learn scorer name"):
        api.load_config(write_config(tmp_path, sections, "bad.toml"))


def test_an_in_memory_grid_writes_its_report(grouped, tmp_path):
    grid = grouped[0]
    path = grid.report(tmp_path / "grid.html")
    text = path.read_text(encoding="utf-8")
    assert grid.advise().headline in text and "kept in memory" in text


def test_time_ordered_splits_never_train_on_later_rows_and_shrink_history():
    # Forward-in-time validation (scikit-learn's TimeSeriesSplit blocks): every
    # training row precedes every validation row; smaller sizes keep the latest rows.
    rng = np.random.default_rng(5)
    n = 300
    day = rng.permutation(n)                      # the file is not in time order
    X = pd.DataFrame({"a": rng.normal(size=n), "day": day})
    y = X.a.to_numpy() + 0.01 * day + rng.normal(0, 0.3, n)
    from gridplan.grid import _folds
    folds = _folds(4, X, y, None, "regression", 1, 0, time=day)
    assert len(folds) == 4
    for fold in folds:
        assert day[fold.train].max() < day[fold.test].min()
        for m in (10, 30, 60):
            assert set(fold.train[:m]) <= set(fold.train[:2 * m])
            latest = np.sort(day[fold.train])[-m:]
            assert sorted(day[fold.train[:m]]) == list(latest)    # less history, not thinning
    grid = gridplan.measure(Ridge(), X, y, capacity=("alpha", [0.1, 10.0]), cv=4, time=day,
                            train_sizes=3)
    assert (grid.cells.status == "ok").all()
    assert grid.cells.train_size.max() == min(len(f.train) for f in folds)


def test_config_groups_and_time_columns(tmp_path):
    # Grouped K-fold from a column: no site on both sides of a split (GroupKFold's contract).
    X, y, sites = _sites(12, 10)
    X.assign(y=y, site=sites, day=np.arange(len(y))).to_csv(tmp_path / "data.csv", index=False)
    base = {"data": {"path": "data.csv", "target": "y", "features": ["a", "b"]},
            "model": {"family": "poly-ridge", "capacity": {"values": [1, 2]}},
            "sizes": {"count": 3}}
    config = api.load_config(write_config(tmp_path, {**base, "resampling": {"groups": "site",
                                                                            "folds": 4}}))
    spec = api.check(config)
    assert spec.dataset.groups is not None and "site" not in spec.dataset.X.columns
    for fold in spec.folds:
        assert not set(sites[fold.train]) & set(sites[fold.test])
    timed = api.load_config(write_config(tmp_path, {**base, "resampling": {"time": "day"}},
                                         "timed.toml"))
    for fold in api.check(timed).folds:
        assert fold.train.max() < fold.test.min()            # day is the row number here
    for resampling, message in (({"groups": "site", "time": "day"}, "cannot both be set"),
                                ({"time": "day", "repeats": 2}, "must be 1 with time"),
                                ({"groups": "nowhere"}, "no column 'nowhere' named in "
                                                        "[resampling] groups")):
        with pytest.raises(GridplanError, match=message.replace("[", "\\[").replace("]", "\\]")):
            api.check(api.load_config(write_config(tmp_path, {**base, "resampling": resampling},
                                                   "bad.toml")))


def test_sample_weights_reach_the_fits_and_the_errors(grouped):
    # Reference: scikit-learn's cross_validate with the weights routed to the fit and
    # to the scorer (metadata routing), on the same GroupKFold splits.
    import sklearn
    from sklearn.metrics import get_scorer
    _, X, y, sites, _ = grouped
    weights = np.random.default_rng(1).uniform(0.2, 3.0, len(y))
    grid = gridplan.measure(PIPE, X, y, capacity=("poly__degree", [2]),
                            regularization=("ridge__alpha", [1.0]), cv=GroupKFold(5),
                            groups=sites, train_sizes=[100, 480], sample_weight=weights)
    cells = grid.cells
    full = cells[cells.train_size == 480].sort_values("fold")
    with sklearn.config_context(enable_metadata_routing=True):
        ridge = Ridge(alpha=1.0).set_fit_request(sample_weight=True)
        scale = StandardScaler().set_fit_request(sample_weight=False)   # weights go to the last step
        model = Pipeline([("poly", PolynomialFeatures(degree=2, include_bias=False)),
                          ("scale", scale), ("ridge", ridge)])
        scorer = get_scorer("neg_mean_squared_error").set_score_request(sample_weight=True)
        ref = cross_validate(model, X, y, cv=GroupKFold(5), scoring=scorer,
                             return_train_score=True,
                             params={"sample_weight": weights, "groups": sites})
    np.testing.assert_allclose(full.validation_error, -ref["test_score"], rtol=1e-9)
    np.testing.assert_allclose(full.train_error, -ref["train_score"], rtol=1e-9)
    unweighted = grouped[0].cells
    same = unweighted[(unweighted.capacity == 2) & (unweighted.regularization == 1.0)
                      & (unweighted.train_size == 480)].sort_values("fold")
    assert not np.allclose(same.validation_error, full.validation_error)
    from sklearn.neighbors import KNeighborsRegressor
    with pytest.raises(GridplanError, match="KNeighborsRegressor does not take sample_weight"):
        gridplan.measure(KNeighborsRegressor(), X, y, capacity=("n_neighbors", [5]),
                         sample_weight=weights)


def test_config_weights_column_turns_off_the_shortcut_and_weights_errors(tmp_path):
    X, y, _ = _sites(10, 12)
    weights = np.random.default_rng(2).uniform(0.5, 2.0, len(y))
    X.assign(y=y, w=weights).to_csv(tmp_path / "data.csv", index=False)
    config = api.load_config(write_config(tmp_path, {
        "data": {"path": "data.csv", "target": "y", "weights": "w"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 2]}},
        "sizes": {"count": 3}}))
    spec = api.check(config)
    assert "w" not in spec.dataset.X.columns and spec.dataset.weights is not None
    cells = api.open_run(api.run(config, out=tmp_path / "run", jobs=1)).cells()
    assert (cells.path == "plain").all() and (cells.status == "ok").all()


def test_the_readme_notebook_example_runs_as_written(tmp_path, monkeypatch):
    # The first Python block of the README, executed unchanged.
    from pathlib import Path
    text = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    start = text.index("```python\nimport numpy as np, pandas as pd\nimport gridplan")
    block = text[start + len("```python\n"):text.index("```", start + 10)]
    monkeypatch.chdir(tmp_path)
    namespace: dict = {}
    exec(compile(block, "README.md", "exec"), namespace)
    assert isinstance(namespace["advice"], Advice)
    assert namespace["grid"].cells.train_size.max() == 480
    assert os.listdir(tmp_path) == []                       # nothing written
