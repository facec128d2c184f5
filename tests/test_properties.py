"""Property: any config on any small table gives a clean run or one sentence, never a crash."""

from __future__ import annotations

import tempfile
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from gridplan import api
from gridplan.common.errors import GridplanError
from gridplan.measuring.config import load_config
from tests.helpers import write_config

METRICS = ["mse", "rmse", "mae", "error_rate", "log_loss", "r2"]


@st.composite
def tables(draw):
    n = draw(st.integers(3, 60))
    n_num = draw(st.integers(0, 3))
    rng = np.random.default_rng(draw(st.integers(0, 2 ** 16)))
    frame = pd.DataFrame({f"n{i}": rng.normal(size=n) for i in range(n_num)})
    if draw(st.booleans()) or n_num == 0:
        frame["cat"] = rng.choice(["p", "q", "r"], size=n)
    if draw(st.booleans()):
        frame.iloc[rng.integers(0, n), 0] = np.nan
    kind = draw(st.sampled_from(["numeric", "two", "three", "text", "constant"]))
    if kind == "numeric":
        frame["y"] = rng.normal(size=n)
    elif kind == "two":
        frame["y"] = rng.integers(0, 2, size=n)
    elif kind == "three":
        frame["y"] = rng.choice(["a", "b", "c"], size=n)
    elif kind == "text":
        frame["y"] = rng.choice(["lo", "hi"], size=n)
    else:
        frame["y"] = 1.0
    return frame


@st.composite
def configs(draw):
    family = draw(st.sampled_from(["poly-ridge", "tree", "sklearn.neighbors.KNeighborsRegressor"]))
    model = ({"family": family} if not family.startswith("sklearn")
             else {"estimator": family})
    cap = draw(st.lists(st.integers(-1, 5), min_size=0, max_size=3))
    if family == "poly-ridge":
        model["capacity"] = {"values": cap}
        model["regularization"] = {"values": draw(st.lists(
            st.floats(-1, 100, allow_nan=False), min_size=1, max_size=3))}
    elif family == "tree":
        model["capacity"] = {"values": cap}
        model["regularization"] = {"param": draw(st.sampled_from(["min_samples_leaf", "ccp_alpha"])),
                                   "values": draw(st.lists(st.integers(0, 5), min_size=1, max_size=2))}
    else:
        model["capacity"] = {"param": draw(st.sampled_from(["n_neighbors", "k"])), "values": cap}
    sections = {
        "data": {"path": "data.csv", "target": "y",
                 "task": draw(st.sampled_from(["regression", "classification"])),
                 "missing": draw(st.sampled_from(["refuse", "impute"]))},
        "model": model,
        "resampling": {"folds": draw(st.integers(1, 5)), "seed": draw(st.integers(0, 5))},
        "goal": {"metric": draw(st.sampled_from(METRICS)),
                 "target": draw(st.floats(-1, 2, allow_nan=False))},
    }
    if draw(st.booleans()):
        sections["sizes"] = {"values": draw(st.lists(st.integers(-2, 40), min_size=1, max_size=3))}
    else:
        sections["sizes"] = {"count": draw(st.integers(0, 4)), "smallest": draw(st.integers(1, 10))}
    return sections


def _ascending(values):
    return sorted(set(values))


@st.composite
def sane_configs(draw):
    """Configs that are mostly valid, so that clean runs are exercised too."""
    task = draw(st.sampled_from(["regression", "classification"]))
    family = draw(st.sampled_from(["poly-ridge", "tree"]))
    caps = _ascending(draw(st.lists(st.integers(1, 3), min_size=1, max_size=2)))
    if family == "poly-ridge":
        regs = _ascending(draw(st.lists(st.sampled_from([0.01, 1.0, 10.0]), min_size=1, max_size=2)))
        reg = {"values": regs}
    else:
        reg = {"param": "min_samples_leaf",
               "values": _ascending(draw(st.lists(st.integers(1, 4), min_size=1, max_size=2)))}
    metric = draw(st.sampled_from(["mse", "mae"] if task == "regression"
                                  else ["error_rate", "log_loss"]))
    return {
        "data": {"path": "data.csv", "target": "y", "task": task, "missing": "impute"},
        "model": {"family": family, "capacity": {"values": caps}, "regularization": reg},
        "sizes": {"count": draw(st.integers(1, 3)), "smallest": draw(st.integers(3, 8))},
        "resampling": {"folds": draw(st.integers(2, 4)), "seed": draw(st.integers(0, 3))},
        "goal": {"metric": metric, "target": 0.5},
    }


@st.composite
def sane_pairs(draw):
    """A mostly valid config with a table that fits its task."""
    sections = draw(sane_configs())
    n = draw(st.integers(30, 80))
    rng = np.random.default_rng(draw(st.integers(0, 2 ** 16)))
    frame = pd.DataFrame({"n0": rng.normal(size=n), "n1": rng.uniform(size=n)})
    if draw(st.booleans()):
        frame["cat"] = rng.choice(["p", "q"], size=n)
    if draw(st.booleans()):
        frame.loc[0, "n1"] = np.nan
    signal = frame.n0 + frame.n1.fillna(0)
    if sections["data"]["task"] == "regression":
        frame["y"] = signal + rng.normal(scale=0.3, size=n)
    else:
        frame["y"] = np.where(signal + rng.normal(scale=0.5, size=n) > 0.5, "up", "down")
    return frame, sections


@settings(max_examples=60, deadline=None, suppress_health_check=list(HealthCheck))
@given(case=st.one_of(st.tuples(tables(), configs()), sane_pairs()))
def test_any_input_gives_a_run_or_one_sentence(case):
    frame, sections = case
    with tempfile.TemporaryDirectory() as folder, warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tmp = Path(folder)
        frame.to_csv(tmp / "data.csv", index=False)
        try:
            config = load_config(write_config(tmp, sections))
            run_dir = api.run(config, out=tmp / "run", jobs=1)
        except GridplanError as exc:
            message = str(exc)
            event("one-sentence error")
            assert message and "\n" not in message and "Traceback" not in message
            return
        cells = api.open_run(run_dir).cells()
        event("clean run")
        assert len(cells) > 0
        assert set(cells.status) <= {"ok", "failed"}
        ok = cells[cells.status == "ok"]
        assert (ok.validation_error >= 0).all() and (ok.train_error >= 0).all()
