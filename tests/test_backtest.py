"""Backtest: forecasts from a quarter of the data against the measured full-size error."""

from __future__ import annotations

import warnings

import pytest
from sklearn.datasets import load_digits

from gridplan.backtest import backtest, backtest_spec
from gridplan.common.errors import GridplanError
from gridplan.measuring.config import load_config
from gridplan.measuring.spec import resolve
from gridplan.showing.text import render_backtest
from tests.helpers import write_config


def _digits_config(tmp_path):
    # Open data set shipped with scikit-learn: load_digits (1797 images, 10 classes).
    frame = load_digits(as_frame=True).frame.rename(columns={"target": "digit"})
    frame.to_csv(tmp_path / "digits.csv", index=False)
    return load_config(write_config(tmp_path, {
        "data": {"path": "digits.csv", "target": "digit", "task": "classification"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1]},
                  "regularization": {"values": [0.1, 10.0, 100.0]}},
        "sizes": {"count": 8, "smallest": 40},
        "resampling": {"folds": 5, "seed": 0},
        "goal": {"metric": "error_rate", "confidence": 0.9}}))


def test_digits_backtest_forecasts_the_full_size_error(tmp_path):
    # Data: scikit-learn's digits. Measured here: median |relative error| of
    # the forecast at 1437 rows from sizes <= 359 was 24% (see README).
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        config = _digits_config(tmp_path)
        result = backtest(config, fraction=0.25, out=tmp_path / "bt", jobs=1, n_boot=100)
    assert result["full_size"] == 1437
    assert max(result["fitted_sizes"]) <= 0.25 * 1437
    assert len(result["rows"]) == 3
    assert result["median_abs_rel_error"] < 0.5      # loose bound; the figure goes to the README
    assert 0 <= result["coverage"] <= 1
    for row in result["rows"]:
        assert row["low"] <= row["predicted"] <= row["high"]
        assert 0.02 < row["measured"] < 0.2           # linear models on digits: a few % error
    text = render_backtest(result)
    assert "median |relative error|" in text


def test_fraction_must_leave_enough_sizes(tmp_path):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        spec = resolve(_digits_config(tmp_path))
    with pytest.raises(GridplanError, match="strictly between 0 and 1"):
        backtest_spec(spec, 1.5)
    with pytest.raises(GridplanError, match="use a larger fraction"):
        backtest_spec(spec, 0.01)
    small = backtest_spec(spec, 0.25)
    assert small.sizes[-1] == 1437 and small.sizes[-2] <= 359
