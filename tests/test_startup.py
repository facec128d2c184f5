"""Import only what the work needs: a run whose every cell has an exact shortcut loads no scikit-learn.

The pieces that make it possible are checked bit for bit against the
scikit-learn calls they stand in for (reference library).
"""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest
from sklearn.model_selection import RepeatedKFold
from sklearn.preprocessing import PolynomialFeatures, StandardScaler

from gridplan.measuring.fastpaths import polynomial_features, standard_scaling
from gridplan.measuring.splits import repeated_kfold
from tests.helpers import write_config


@pytest.mark.parametrize("n_inputs", [1, 2, 3, 6])
@pytest.mark.parametrize("degree", [1, 2, 4, 7])
def test_polynomial_features_equal_the_transformer_bit_for_bit(n_inputs, degree):
    # reference library: sklearn.preprocessing.PolynomialFeatures(degree, include_bias=False)
    rng = np.random.default_rng(10 * n_inputs + degree)
    X = rng.normal(size=(40, n_inputs)) * rng.uniform(0.01, 30.0, n_inputs)
    ours = polynomial_features(X, degree)
    theirs = PolynomialFeatures(degree, include_bias=False).fit_transform(X)
    assert ours.shape == theirs.shape
    assert np.array_equal(ours, theirs)


def test_standard_scaling_equals_the_scaler_bit_for_bit():
    # reference library: sklearn.preprocessing.StandardScaler().fit(P).mean_ and .scale_,
    # including constant columns and one that varies only within rounding (scale 1 there).
    rng = np.random.default_rng(3)
    wide = polynomial_features(rng.uniform(-2.0, 2.0, size=(300, 3)), 6)
    odd = np.column_stack([np.full(50, 3.3), rng.normal(size=50), np.zeros(50),
                           7.0 + 1e-15 * rng.normal(size=50), rng.exponential(1e6, size=50)])
    for P in (wide, odd, wide[:7]):
        scaler = StandardScaler().fit(P)
        mean, scale = standard_scaling(P)
        assert np.array_equal(mean, scaler.mean_)
        assert np.array_equal(scale, scaler.scale_)
    assert standard_scaling(odd)[1][[0, 2]].tolist() == [1.0, 1.0]


@pytest.mark.parametrize("n_rows,folds,repeats,seed", [(10, 2, 1, 0), (101, 5, 3, 7), (8000, 5, 1, 3),
                                                      (37, 10, 2, 2**32 - 1), (5, 5, 4, 11)])
def test_repeated_kfold_equals_the_library_split(n_rows, folds, repeats, seed):
    # reference library: sklearn.model_selection.RepeatedKFold(folds, repeats, random_state=seed)
    ours = list(repeated_kfold(n_rows, folds=folds, repeats=repeats, seed=seed))
    theirs = list(RepeatedKFold(n_splits=folds, n_repeats=repeats, random_state=seed)
                  .split(np.zeros(n_rows)))
    assert len(ours) == len(theirs) == folds * repeats
    for (train, test), (their_train, their_test) in zip(ours, theirs):
        assert np.array_equal(train, their_train) and np.array_equal(test, their_test)


def _fresh_run(tmp_path, degrees, alphas) -> dict:
    """`gridplan run` in a fresh process; which heavy modules it loaded, and its cells."""
    rng = np.random.default_rng(0)
    x = rng.uniform(-1.0, 1.0, size=(400, 2))
    y = x[:, 0] ** 2 - x[:, 1] + rng.normal(scale=0.2, size=len(x))
    rows = ["x1,x2,y"] + [",".join(f"{v:.17g}" for v in row) for row in np.column_stack([x, y])]
    (tmp_path / "data.csv").write_text("\n".join(rows) + "\n", encoding="utf-8")
    config = write_config(tmp_path, {
        "data": {"path": "data.csv", "target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"param": "degree", "values": degrees},
                  "regularization": {"param": "alpha", "values": alphas}},
        "sizes": {"count": 3}, "resampling": {"folds": 3, "seed": 1}})
    probe = ("import json, sys, runpy\n"
             f"sys.argv = ['gridplan', 'run', {str(config)!r}, '--out', {str(tmp_path / 'run')!r}, "
             "'--jobs', '2']\n"
             "try:\n    runpy.run_module('gridplan', run_name='__main__')\n"
             "except SystemExit as stop:\n    assert not stop.code, stop.code\n"
             "print(json.dumps({m: m in sys.modules for m in ('sklearn', 'scipy.stats')}))\n")
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True,
                         cwd=tmp_path)
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_a_well_conditioned_ridge_run_loads_no_scikit_learn(tmp_path):
    # common practice, no published source: start-up counts in a command-line tool.
    loaded = _fresh_run(tmp_path, [1, 2, 3], [0.1, 1.0, 10.0])
    assert loaded == {"sklearn": False, "scipy.stats": False}
    from gridplan.api import open_run
    cells = open_run(tmp_path / "run").cells()
    assert len(cells) == 3 * 3 * 3 * 3 and (cells["status"] == "ok").all()


def test_an_ill_conditioned_cell_gets_the_library_numbers_without_the_library(tmp_path):
    # reference library: the same grid with the shortcut switched off ([run] fast_path = false) is
    # Pipeline(PolynomialFeatures, StandardScaler, Ridge) fitted cell by cell. Degree 8 at alpha
    # 1e-9 is past the SVD shortcut's bound, so those cells are solved the library's way (Cholesky
    # of the normal equations on the same products) and must equal its fits exactly.
    from gridplan.api import open_run, run

    loaded = _fresh_run(tmp_path, [8], [1e-9])
    assert loaded == {"sklearn": False, "scipy.stats": False}
    ours = open_run(tmp_path / "run").cells()
    assert (ours["path"] == "plain-fallback").any()
    text = (tmp_path / "grid.toml").read_text(encoding="utf-8")
    (tmp_path / "plain.toml").write_text(text + "\n[run]\nfast_path = false\n", encoding="utf-8")
    plain = open_run(run(tmp_path / "plain.toml", out=tmp_path / "plain", jobs=1)).cells()
    assert (plain["path"] == "plain").all()
    keys = ["train_size", "repeat", "fold"]
    joined = ours.merge(plain, on=keys, suffixes=("", "_plain"))
    assert len(joined) == len(ours) == len(plain)
    fallback = joined[joined["path"] == "plain-fallback"]
    assert (fallback["validation_error"] == fallback["validation_error_plain"]).all()
    assert (fallback["train_error"] == fallback["train_error_plain"]).all()


def test_the_blas_limit_covers_scipy_loaded_after_it():
    # The ridge path's QR runs in SciPy's own BLAS; worker threads must see one BLAS thread there too.
    probe = ("import json\nfrom threadpoolctl import threadpool_info\n"
             "from gridplan.measuring.runner import _one_blas_thread\n"
             "with _one_blas_thread():\n"
             "    import scipy.linalg\n"
             "    print(json.dumps([i['num_threads'] for i in threadpool_info() if i['user_api'] == 'blas']))\n")
    out = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    counts = json.loads(out.stdout.strip().splitlines()[-1])
    assert len(counts) >= 1 and set(counts) == {1}
