"""Backtest the learning-curve forecasts on a corpus of real and synthetic tasks.

    python benchmarks/corpus.py [--only NAME ...] [--jobs 2] [--json out.json]

Each member is a data set, a model family and a small grid. `gridplan
backtest` runs it with training sizes up to a quarter of the training fold
plus the full fold (x4 extrapolation), fits the curves on the small sizes only
(with the run's own calibration), and compares the forecast at the full fold
with the measurement. Printed per member: settings, median |relative error|,
share of measurements inside the 90% band, and the calibration applied; then
the pooled figures. Real data comes from what scikit-learn and statsmodels
ship; synthetic tasks are drawn from known generators with the model family
deliberately misspecified (trees, nearest neighbours and boosting on smooth
targets; straight lines on curved ones).
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

CONFIDENCE = 0.9
FRACTION = 0.25


@dataclass(frozen=True)
class Member:
    """One corpus member: where its data comes from and the grid it runs."""

    name: str
    source: str
    data: Callable[[], pd.DataFrame]      # features plus a column "y"
    task: str
    model: dict
    smallest: int = 30


# --- data sources ---------------------------------------------------------------------

def _fair() -> pd.DataFrame:
    # statsmodels.datasets.fair: 6,366 survey answers, target the affairs measure.
    import statsmodels.api as sm
    frame = sm.datasets.fair.load_pandas().data
    return frame.rename(columns={"affairs": "y"})


def _randhie() -> pd.DataFrame:
    # statsmodels.datasets.randhie: 20,190 rows of a health-insurance experiment, target visits.
    import statsmodels.api as sm
    frame = sm.datasets.randhie.load_pandas().data
    return frame.rename(columns={"mdvis": "y"})


def _anes96() -> pd.DataFrame:
    # statsmodels.datasets.anes96: 944 voters, target party identification (7 classes).
    import statsmodels.api as sm
    frame = sm.datasets.anes96.load_pandas().data
    return frame.rename(columns={"PID": "y"}).drop(columns=["vote"])


def _sklearn(loader: str) -> Callable[[], pd.DataFrame]:
    def load() -> pd.DataFrame:
        import sklearn.datasets as ds
        bunch = getattr(ds, loader)()
        frame = pd.DataFrame(bunch.data, columns=[f"f{i}" for i in range(bunch.data.shape[1])])
        frame["y"] = bunch.target
        return frame
    return load


def _friedman1(n: int = 6000) -> pd.DataFrame:
    # sklearn.datasets.make_friedman1 (Friedman 1991): smooth target, noise sd 1.
    from sklearn.datasets import make_friedman1
    X, y = make_friedman1(n_samples=n, noise=1.0, random_state=0)
    frame = pd.DataFrame(X, columns=[f"x{i}" for i in range(X.shape[1])])
    frame["y"] = y
    return frame


def _curved_line(n: int = 6000) -> pd.DataFrame:
    # y = sin(2 x1) + x2^2 + noise: a straight line cannot follow it (bias stays).
    rng = np.random.default_rng(1)
    X = rng.uniform(-2, 2, size=(n, 3))
    frame = pd.DataFrame(X, columns=["x1", "x2", "x3"])
    frame["y"] = np.sin(2 * X[:, 0]) + X[:, 1] ** 2 + rng.normal(scale=0.5, size=n)
    return frame


def _classes(n: int = 6000) -> pd.DataFrame:
    # sklearn.datasets.make_classification: 2 classes, 8 informative of 12 features, 3% flips.
    from sklearn.datasets import make_classification
    X, y = make_classification(n_samples=n, n_features=12, n_informative=8, flip_y=0.03,
                               random_state=2)
    frame = pd.DataFrame(X, columns=[f"x{i}" for i in range(12)])
    frame["y"] = y
    return frame


def _ridge(degrees, alphas) -> dict:
    return {"family": "poly-ridge", "capacity": {"values": list(degrees)},
            "regularization": {"values": list(alphas)}}


def _tree(depths) -> dict:
    return {"family": "tree", "capacity": {"values": list(depths)}}


def _estimator(path: str, param: str, values, params: dict | None = None) -> dict:
    out = {"estimator": path, "capacity": {"param": param, "values": list(values)}}
    if params:
        out["params"] = params
    return out


MEMBERS = [
    Member("fair-ridge", "statsmodels fair", _fair, "regression", _ridge([1, 2, 3], [1e-3, 1.0, 100.0])),
    Member("fair-tree", "statsmodels fair", _fair, "regression", _tree([2, 4, 6, 10])),
    Member("randhie-knn", "statsmodels randhie", _randhie, "regression",
           _estimator("sklearn.neighbors.KNeighborsRegressor", "n_neighbors", [5, 20, 80])),
    Member("randhie-tree", "statsmodels randhie", _randhie, "regression", _tree([3, 6, 9])),
    Member("anes96-tree", "statsmodels anes96", _anes96, "classification", _tree([2, 4, 8]), 60),
    Member("digits-ridge", "sklearn load_digits", _sklearn("load_digits"), "classification",
           _ridge([1], [0.1, 10.0, 1000.0]), 60),
    Member("digits-knn", "sklearn load_digits", _sklearn("load_digits"), "classification",
           _estimator("sklearn.neighbors.KNeighborsClassifier", "n_neighbors", [1, 5, 25]), 60),
    Member("cancer-tree", "sklearn load_breast_cancer", _sklearn("load_breast_cancer"),
           "classification", _tree([1, 2, 4, 8]), 20),
    Member("diabetes-ridge", "sklearn load_diabetes", _sklearn("load_diabetes"), "regression",
           _ridge([1, 2], [0.1, 10.0]), 20),
    Member("friedman-tree", "sklearn make_friedman1", _friedman1, "regression", _tree([3, 6, 9, 12])),
    Member("friedman-knn", "sklearn make_friedman1", _friedman1, "regression",
           _estimator("sklearn.neighbors.KNeighborsRegressor", "n_neighbors", [3, 10, 30])),
    Member("friedman-boost", "sklearn make_friedman1", _friedman1, "regression",
           _estimator("sklearn.ensemble.HistGradientBoostingRegressor", "max_leaf_nodes", [4, 16],
                      {"max_iter": 60, "random_state": 0})),
    Member("curved-linear", "generated: sin + square + noise", _curved_line, "regression",
           _ridge([1], [1e-3, 10.0])),
    Member("classes-tree", "sklearn make_classification", _classes, "classification",
           _tree([2, 5, 8, 12]), 40),
    Member("classes-knn", "sklearn make_classification", _classes, "classification",
           _estimator("sklearn.neighbors.KNeighborsClassifier", "n_neighbors", [3, 15, 45]), 40),
]


# --- running ----------------------------------------------------------------------------

def _toml(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return json.dumps(value)
    if isinstance(value, dict):
        return "{ " + ", ".join(f"{k} = {_toml(v)}" for k, v in value.items()) + " }"
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml(v) for v in value) + "]"
    return repr(value)


def write_member(member: Member, folder: Path) -> Path:
    """Data file and config of one member; returns the config path."""
    member.data().to_csv(folder / "data.csv", index=False)
    sections = {
        "data": {"path": "data.csv", "target": "y", "task": member.task},
        "model": member.model,
        "sizes": {"count": 8, "smallest": member.smallest},
        "resampling": {"folds": 5, "repeats": 1, "seed": 7},
        "goal": {"confidence": CONFIDENCE},
    }
    lines = []
    for section, body in sections.items():
        lines.append(f"[{section}]")
        lines += [f"{k} = {_toml(v)}" for k, v in body.items()]
        lines.append("")
    path = folder / f"{member.name}.toml"
    path.write_text("\n".join(lines), encoding="utf-8")
    return path


def backtest_member(member: Member, folder: Path, jobs: int) -> dict:
    """Backtest one member; its rows, summary figures and calibration."""
    from gridplan.backtest import backtest
    from gridplan.measuring.config import load_config
    folder.mkdir(parents=True, exist_ok=True)
    config = load_config(write_member(member, folder))
    result = backtest(config, fraction=FRACTION, out=folder / "run", jobs=jobs,
                      allow_any_estimator=False)
    return result


def measurement_noise(run_dir: Path, full_size: int) -> float:
    """Median over settings of the measured full-size error's own relative standard error.

    The spread over (repeat, fold) units with the corrected resampled-t variance
    factor 1/J + n_test/n_train (Nadeau & Bengio 2003, Machine Learning 52): the
    part of a forecast's miss that is the measurement's, not the forecast's.
    """
    from gridplan.api import open_run
    cells = open_run(run_dir).cells()
    full = cells[(cells.status == "ok") & (cells.train_size == full_size)]
    noise = []
    for _, group in full.groupby(["capacity_index", "regularization_index"]):
        errors = group.validation_error.to_numpy()
        mean = float(errors.mean())
        if errors.size < 2 or mean <= 0:
            continue
        folds = int(group.fold.max()) + 1
        factor = 1.0 / errors.size + 1.0 / (folds - 1)      # n_test / n_train = 1 / (K - 1)
        noise.append(float(np.sqrt(factor * errors.var(ddof=1))) / mean)
    return float(np.median(noise)) if noise else float("nan")


def own_check_line(rows: list[dict]) -> str:
    """How well each setting's own check (refits on its smaller sizes) foretells its x4 error."""
    from scipy.stats import spearmanr
    pairs = np.array([(r["own_check_error"], r["rel_error"]) for r in rows
                      if r.get("own_check_error") is not None and r["rel_error"] is not None])
    if len(pairs) < 3:
        return "own checks: too few settings"
    own, x4 = pairs.T
    cut = float(np.quantile(own, 0.75))
    return (f"own checks vs x4 error over {len(pairs)} settings: Spearman "
            f"{spearmanr(own, x4).statistic:.2f}; own check above its top-quartile edge "
            f"{cut:.1%}: x4 median {np.median(x4[own > cut]):.1%}, the rest "
            f"{np.median(x4[own <= cut]):.1%}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", nargs="*", help="member names to run")
    parser.add_argument("--jobs", type=int, default=2)
    parser.add_argument("--json", type=Path, help="write every row here")
    args = parser.parse_args()
    members = [m for m in MEMBERS if not args.only or m.name in args.only]
    table, pooled = [], []
    with tempfile.TemporaryDirectory(prefix="gridplan-corpus-") as tmp:
        for member in members:
            started = time.perf_counter()
            result = backtest_member(member, Path(tmp) / member.name, args.jobs)
            rows = result["rows"]
            pooled += [dict(r, member=member.name) for r in rows]
            rel = [r["rel_error"] for r in rows if r["rel_error"] is not None]
            lean = [r["predicted"] < r["measured"] for r in rows]
            calibration = result.get("calibration") or {}
            noise = measurement_noise(Path(result["run_dir"]), int(result["full_size"]))
            table.append({"member": member.name, "source": member.source, "noise": noise,
                          "settings": len(rows), "median_rel_error": float(np.median(rel)),
                          "coverage": float(np.mean([r["inside_band"] for r in rows])),
                          "too_low": float(np.mean(lean)),
                          "lean": calibration.get("lean"), "spread": calibration.get("spread"),
                          "level_spread": calibration.get("level_spread"),
                          "seconds": time.perf_counter() - started})
            t = table[-1]
            print(f"{t['member']:<16} {t['source']:<28} {t['settings']:>3} settings  "
                  f"median |rel err| {t['median_rel_error']:6.1%} (measurement noise {t['noise']:5.1%})  "
                  f"in 90% band {t['coverage']:5.0%}  "
                  f"too low {t['too_low']:4.0%}  lean {t['lean']:.2f} drop spread "
                  f"{t['spread']:.2f} level spread {t['level_spread']:.3f}  "
                  f"({t['seconds']:.0f} s)", flush=True)
    rel = [r["rel_error"] for r in pooled if r["rel_error"] is not None]
    coverage = float(np.mean([r["inside_band"] for r in pooled]))
    worst = min(t["coverage"] for t in table)
    print(f"pooled: {len(pooled)} settings, median |rel err| {np.median(rel):.1%}, "
          f"in 90% band {coverage:.0%} (lowest member {worst:.0%}), "
          f"largest member median {max(t['median_rel_error'] for t in table):.1%}")
    print(own_check_line(pooled))
    if args.json:
        args.json.write_text(json.dumps({"members": table, "rows": pooled}, indent=1))


if __name__ == "__main__":
    sys.exit(main())
