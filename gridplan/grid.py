"""Measure a grid from a notebook: an estimator object and data in memory.

    >>> import gridplan
    >>> grid = gridplan.measure(pipeline, X, y, capacity=("poly__degree", [1, 2, 3]),
    ...                         regularization=("ridge__alpha", [0.01, 1, 100]),
    ...                         cv=GroupKFold(5), groups=sites)
    >>> grid.cells                     # one row per fit
    >>> grid.advise(target=0.4).headline

The estimator is cloned and set with `set_params` for every setting, so any
scikit-learn estimator or Pipeline works (nested names such as
`ridge__alpha`). With `store=None` nothing is written to disk: the fits go to
an SQLite store in memory. A path gives the resumable run folder the CLI uses.
"""

from __future__ import annotations

import dataclasses
import hashlib
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import pandas as pd

from gridplan.common.checks import check_metric
from gridplan.common.errors import InputError
from gridplan.measuring.config import DEFAULT_METRIC, Axis, Config, Costs, ModelConfig, value_label
from gridplan.measuring.runs import Run, open_run

MEMORY = "in memory"      # what a grid kept in memory gives as its run folder in results


# --- inputs ---------------------------------------------------------------------------------------

def _axis(name: str, given: Any, estimator: Any, X: pd.DataFrame) -> Axis:
    """(param, values) or a list of nested feature sets -> an Axis, checked against the estimator."""
    if given is None:
        return Axis(param=None, values=(None,))
    if isinstance(given, tuple) and len(given) == 2 and isinstance(given[0], str):
        param, values = given
        values = list(values)
        if not values:
            raise InputError(f"{name} {param!r} has no values.")
        known = estimator.get_params(deep=True)
        if param not in known:
            close = [k for k in known if k.endswith("__" + param) or k == param.split("__")[-1]]
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise InputError(f"{name} parameter {param!r} is not a parameter of "
                             f"{type(estimator).__name__}{hint}.")
        return Axis(param=param, values=tuple(values))
    sets = [tuple(s) for s in given] if isinstance(given, (list, tuple)) else None
    if name == "capacity" and sets and all(isinstance(s, tuple) and s for s in sets):
        for i in range(1, len(sets)):
            if not set(sets[i - 1]) < set(sets[i]):
                raise InputError(f"capacity feature sets must be nested; set {i + 1} "
                                 f"{list(sets[i])!r} does not extend {list(sets[i - 1])!r}.")
        absent = [c for c in sets[-1] if c not in X.columns]
        if absent:
            raise InputError(f"capacity feature set names {absent[0]!r}, which X does not have.")
        return Axis(param=None, values=tuple(range(1, len(sets) + 1)), feature_sets=tuple(sets))
    raise InputError(f"{name} must be (parameter name, values)"
                     + (" or a list of nested feature sets" if name == "capacity" else "")
                     + f", got {given!r}.")


def _frame(X: Any) -> pd.DataFrame:
    if isinstance(X, pd.DataFrame):
        return X.reset_index(drop=True)
    array = np.asarray(X)
    if array.ndim != 2:
        raise InputError(f"X must be a table (2-D), got an array of shape {array.shape}.")
    return pd.DataFrame(array, columns=[f"x{i}" for i in range(array.shape[1])])


def _fingerprint(X: pd.DataFrame, y: np.ndarray) -> str:
    digest = hashlib.sha256(pd.util.hash_pandas_object(X, index=False).to_numpy().tobytes())
    digest.update(np.ascontiguousarray(pd.util.hash_array(np.asarray(y, dtype=object))).tobytes())
    return digest.hexdigest()


def _sample_weight(weights: Any, n_rows: int) -> np.ndarray | None:
    if weights is None:
        return None
    values = np.asarray(weights, dtype=float)
    if values.ndim != 1 or len(values) != n_rows:
        raise InputError(f"sample_weight must give one weight per row: X has {n_rows:,} rows, "
                         f"sample_weight has shape {values.shape}.")
    if not np.isfinite(values).all() or (values < 0).any() or not values.any():
        raise InputError("sample_weight must be finite, non-negative and not all zero.")
    return values


def _task(estimator: Any, y: np.ndarray, task: str | None) -> str:
    if task is not None:
        if task not in ("regression", "classification"):
            raise InputError(f"task must be 'regression' or 'classification', got {task!r}.")
        return task
    from sklearn.base import is_classifier
    return "classification" if is_classifier(estimator) else "regression"


# --- measure --------------------------------------------------------------------------------------

def measure(estimator: Any, X: Any, y: Any, *, capacity: Any, regularization: Any = None,
            train_sizes: int | Sequence[int] = 8, smallest: int | None = None, cv: Any = 5,
            repeats: int = 1, groups: Any = None, time: Any = None, metric: str | None = None,
            scoring: str | None = None, sample_weight: Any = None,
            task: str | None = None, target: float | None = None, confidence: float = 0.9,
            costs: Costs | dict | None = None, n_jobs: int | None = None, seed: int = 0,
            store: str | Path | None = None, name: str = "grid") -> "Grid":
    """Measure capacity x regularisation x training size by cross-validation; return a Grid.

    `capacity` and `regularization` are (parameter name, values) of the
    estimator (`capacity` may instead be a list of nested feature sets);
    `train_sizes` a count of sizes on a geometric ladder or the sizes
    themselves; `cv` a number of folds or a scikit-learn splitter. With
    `groups` (one label per row) a number of folds means grouped K-fold; with
    `time` (one value per row) forward-in-time splits, each validation block
    trained on the most recent rows before it. Training subsets are nested
    within each training fold. `store=None` keeps everything in memory; a folder
    gives a resumable run folder. `metric` is one of gridplan's error
    metrics (mse, rmse, mae, error_rate, log_loss); `scoring`, a scikit-learn
    scorer name, replaces it: its score becomes an error as 1 - score (r2,
    accuracy, roc_auc, ...) or minus the score for negated losses (neg_*).
    `sample_weight` (one weight per row) goes to every fit (a Pipeline's last
    step) and weights every error. Estimator objects always run plain fits:
    the exact shortcuts serve the built-in families of a config.
    """
    from sklearn.base import clone

    from gridplan.measuring.spec import GridSpec

    try:
        clone(estimator)
    except Exception as exc:       # not an estimator scikit-learn can clone
        raise InputError(f"estimator must be a scikit-learn estimator (clone failed: {exc}).") from None
    frame = _frame(X)
    target_values = np.asarray(y)
    if target_values.ndim != 1 or len(target_values) != len(frame):
        raise InputError(f"y must be one value per row of X: X has {len(frame):,} rows, y has "
                         f"shape {target_values.shape}.")
    task = _task(estimator, target_values, task)
    metric = check_metric(scoring or metric or DEFAULT_METRIC[task], task,
                          "scoring" if scoring else "metric")
    labels = np.unique(target_values) if task == "classification" else None
    if task == "regression":
        target_values = target_values.astype(float)
    cap = _axis("capacity", capacity, estimator, frame)
    reg = _axis("regularization", regularization, estimator, frame)
    model = ModelConfig(name=type(estimator).__name__, family=None, estimator=None, params={},
                        capacity=cap, regularization=reg)
    config = _config(model, metric=metric, task=task, target=target, confidence=confidence,
                     costs=costs, seed=seed, repeats=repeats, name=name)
    folds = _folds(cv, frame, target_values, groups, task, repeats, seed, time)
    sizes = _sizes(folds, train_sizes, smallest, labels)
    numeric = tuple(c for c in frame.columns if pd.api.types.is_numeric_dtype(frame[c]))
    categorical = tuple(c for c in frame.columns if c not in numeric)
    from gridplan.measuring.data import Dataset
    from gridplan.measuring.families import ModelPlan
    weights = _sample_weight(sample_weight, len(frame))
    dataset = Dataset(X=frame, y=target_values, numeric=numeric, categorical=categorical,
                      labels=labels, fingerprint=_fingerprint(frame, target_values),
                      weights=weights)
    plan = ModelPlan(family=None, estimator_cls=type(estimator), task=task, params={},
                     capacity_param=cap.param, capacity_values=cap.values,
                     feature_sets=cap.feature_sets, regularization_param=reg.param,
                     regularization_values=reg.values, numeric=numeric,
                     categorical=categorical, impute=False, seed=seed, prototype=estimator)
    if weights is not None:
        from gridplan.measuring.families import check_takes_weights
        check_takes_weights(plan, "sample_weight")
    spec = GridSpec(config=config, dataset=dataset, plan=plan, folds=tuple(folds), sizes=sizes)
    jobs = 1 if n_jobs is None else int(n_jobs)
    if store is None:
        return Grid(_measure_in_memory(spec, jobs))
    from gridplan import api
    run_dir = Path(store)
    api.run(config, out=run_dir, jobs=jobs, spec=spec)
    return Grid(open_run(run_dir))


def _config(model: ModelConfig, *, metric: str, task: str, target: float | None,
            confidence: float, costs: Costs | dict | None, seed: int, repeats: int,
            name: str) -> Config:
    """A Config for an in-memory grid: the fields the run and the deciding side read."""
    from gridplan.common.checks import check_confidence, check_target
    if target is not None:
        check_target(target)
    check_confidence(confidence)
    if isinstance(costs, dict):
        unknown = set(costs) - {f.name for f in dataclasses.fields(Costs)}
        if unknown:
            raise InputError(f"costs has unknown key {sorted(unknown)[0]!r}; known keys are "
                             f"{', '.join(f.name for f in dataclasses.fields(Costs))}.")
        costs = Costs(**costs)
    memory = Path(MEMORY)
    return Config(source=memory, text="", data_path=memory, target="y", task=task,
                  features=None, missing="refuse", family=None, estimator=None, params={},
                  capacity=model.capacity, regularization=model.regularization,
                  size_values=None, size_count=8, smallest_size=None, folds=0, repeats=repeats,
                  seed=seed, metric=metric, target_error=target, confidence=confidence,
                  costs=costs or Costs(), jobs=1, scheduler=None, fit_time_limit=None,
                  name=name, fast_path=False, models=(model,))


def _folds(cv: Any, X: pd.DataFrame, y: np.ndarray, groups: Any, task: str, repeats: int,
           seed: int, time: Any = None):
    """Folds from a count (plain, grouped or forward in time: as a config gets them) or a splitter.

    Training rows are in a fixed order, so the subsets of a fold are nested.
    """
    from gridplan.measuring.splits import Fold, make_folds, nested_order
    per_row = {}
    for name, values in (("groups", groups), ("time", time)):
        if values is None:
            continue
        values = np.asarray(values)
        if values.ndim != 1 or len(values) != len(X):
            raise InputError(f"{name} must give one value per row: X has {len(X):,} rows, "
                             f"{name} has shape {values.shape}.")
        per_row[name] = values
    if "groups" in per_row and "time" in per_row:
        raise InputError("groups and time cannot both be given; choose grouped or "
                         "forward-in-time splits.")
    if isinstance(cv, int) and not isinstance(cv, bool):
        if cv < 2:
            raise InputError(f"cv must be at least 2 folds, got {cv}.")
        return make_folds(y, classification=task == "classification", folds=cv,
                          repeats=repeats, seed=seed, **per_row)
    if "time" in per_row:
        raise InputError("time sets forward-in-time splits itself; give cv as a number of "
                         "folds, not a splitter.")
    if not hasattr(cv, "split"):
        raise InputError(f"cv must be a number of folds or a scikit-learn splitter, got {cv!r}.")
    out = []
    for k, (train, test) in enumerate(cv.split(X, y, per_row.get("groups"))):
        rng = np.random.default_rng([seed, 0, k])
        order = nested_order(y[train], rng, task == "classification")
        out.append(Fold(repeat=0, fold=k, train=np.asarray(train)[order], test=np.asarray(test)))
    if len(out) < 2:
        raise InputError(f"cv gave {len(out)} split; a learning curve needs at least 2.")
    return out


def _sizes(folds, train_sizes, smallest, labels) -> tuple[int, ...]:
    from gridplan.measuring.splits import size_ladder, smallest_training_fold
    full = smallest_training_fold(folds)
    if isinstance(train_sizes, int) and not isinstance(train_sizes, bool):
        sizes = size_ladder(full, values=None, count=train_sizes, smallest=smallest,
                            where="train_sizes")
    else:
        values = [int(v) for v in train_sizes]
        if not values or any(v < 1 for v in values) or values != sorted(set(values)):
            raise InputError(f"train_sizes must be positive and ascending, got {list(train_sizes)!r}.")
        sizes = size_ladder(full, values=tuple(values), count=len(values), smallest=None,
                            where="train_sizes")
    if labels is not None and sizes[0] < len(labels):
        raise InputError(f"the smallest training size {sizes[0]} is below the number of "
                         f"classes ({len(labels)}).")
    return sizes


def _measure_in_memory(spec, jobs: int) -> "MemoryRun":
    """Run the grid into an SQLite store in memory and read it back; no file is written."""
    from gridplan.api import _model_meta, as_run_spec
    from gridplan.measuring.runner import run_grid
    from gridplan.measuring.store import Store
    run_spec = as_run_spec(spec)
    with Store(Path(":memory:")) as store:
        entry = _model_meta(spec)
        store.set_meta({"identity": run_spec.measuring_identity(), "task": spec.config.task,
                        "metric": spec.config.metric, **{k: v for k, v in entry.items()
                                                         if k != "axes"},
                        "models": [entry], "n_rows": spec.dataset.n_rows,
                        "sizes": list(spec.sizes), "folds": len(spec.folds) // spec.config.repeats,
                        "repeats": spec.config.repeats, "config_name": MEMORY,
                        "data_path": MEMORY, "target_column": "y",
                        "test_sizes": [int(len(f.test)) for f in spec.folds],
                        "train_fold_sizes": [int(len(f.train)) for f in spec.folds]})
        store.set_axes(entry["axes"])
        run_grid(spec, store, jobs=jobs)
        return MemoryRun(run_dir=None, meta=store.meta(), axes=store.axes(),
                         config=spec.config, frame=store.cells())


@dataclasses.dataclass
class MemoryRun(Run):
    """A run kept in memory (no run folder): its cells are a table held here."""

    frame: pd.DataFrame = None

    def cells(self) -> pd.DataFrame:
        return self.frame.copy()

    def for_model(self, model: str | int) -> "MemoryRun":
        from gridplan.measuring.runs import model_index
        model_index(self.model_names, model)
        return self


# --- the grid -------------------------------------------------------------------------------------

class Grid:
    """A measured grid: its cells, curves, advice and pictures (in memory or from a run folder)."""

    def __init__(self, run: Run):
        self.run = run
        self._curves = None

    @property
    def cells(self) -> pd.DataFrame:
        """One row per fit (the export's columns); axis values numeric where they are numbers."""
        frame = self.run.cells()
        for axis in ("capacity", "regularization"):
            values = [value for _, value in self.run.axes.get(axis, [])]
            if values and all(isinstance(v, (int, float)) and not isinstance(v, bool)
                              for v in values):
                frame[axis] = [values[i] for i in frame[f"{axis}_index"]]
        return frame

    def curves(self, *, target: float | None = None, confidence: float | None = None):
        """Every setting's fitted curve (a gridplan.common.results.CurvesSummary)."""
        from gridplan.deciding.gridfit import curves_summary
        target = target if target is not None else self._config_value("target_error")
        confidence = confidence or self._config_value("confidence") or 0.9
        summary = curves_summary(self._fits(), target=target, confidence=confidence)
        return dataclasses.replace(summary, metric=self.run.meta.get("metric"),
                                   model=self.run.model_name)

    def advise(self, *, target: float | None = None, confidence: float | None = None,
               at: str | None = None, costs: dict | None = None, **cost_values: float):
        """Diagnosis and the cheapest plan (a gridplan.common.results.Advice; `.to_dict()` for JSON).

        Costs as a dict (`costs={"per_sample": 5}`) or as keywords (`per_sample=5`):
        per_sample, capacity_step, regularization_step, max_samples,
        less_capacity_step, per_fit_second.
        """
        from gridplan.deciding.advisor import advise
        values = {**(costs or {}), **cost_values}
        known = {"per_sample", "capacity_step", "regularization_step", "max_samples",
                 "less_capacity_step", "per_fit_second"}
        unknown = sorted(set(values) - known)
        if unknown:
            raise InputError(f"costs has unknown key {unknown[0]!r}; known keys are "
                             f"{', '.join(sorted(known))}.")
        return advise(self.run, target=target, confidence=confidence, at=at,
                      curves=self._fits(), **values)

    def heatmap(self, show: str = "validation", axis: str = "capacity", **options):
        """A heatmap Figure (see gridplan.showing.figures.heatmap_figure)."""
        from gridplan.showing.figures import heatmap_figure
        return heatmap_figure(self.run, show=show, axis=axis, **options)

    def plot_curves(self, target: float | None = None):
        """Learning curves across the capacity axis, as a Figure."""
        from gridplan.showing.figures import small_multiples_figure
        return small_multiples_figure(self.run, self._fits(),
                                      target=target if target is not None else
                                      self._config_value("target_error"))

    def report(self, path: str | Path, *, target: float | None = None,
               confidence: float | None = None) -> Path:
        """Write the one-file HTML report of this grid to `path`; returns the path."""
        from gridplan.showing.gather import gather_inputs
        from gridplan.showing.report import write_inputs
        path = Path(path)
        if self.run.run_dir is not None:
            from gridplan.measuring.runs import refuse_run_file
            refuse_run_file(self.run.run_dir, path, self.run.run_dir / "report.html")
        if path.is_dir():
            raise InputError(f"cannot write the report to {path}: it is a folder; give a file "
                             f"name such as {path / 'report.html'}.")
        return write_inputs(gather_inputs(self.run, target=target, confidence=confidence), path)

    def _fits(self):
        if self._curves is None:
            from gridplan.deciding.curvestore import cached_curves
            self._curves = cached_curves(self.run.run_dir, self.run.cells())
        return self._curves

    def _config_value(self, name: str) -> Any:
        return getattr(self.run.config, name) if self.run.config is not None else None

    def __repr__(self) -> str:
        meta = self.run.meta
        where = MEMORY if self.run.run_dir is None else str(self.run.run_dir)
        return (f"<gridplan.Grid {self.run.model_name}: {len(self.run.axes.get('capacity', []))} "
                f"capacity x {len(self.run.axes.get('regularization', []))} regularisation x "
                f"{len(meta.get('sizes', []))} sizes, {meta.get('metric')}, {where}>")

    def _repr_html_(self) -> str:
        from html import escape
        cells = self.run.cells()
        ok = cells[cells.status == "ok"]
        best = (ok[ok.train_size == ok.train_size.max()]
                .groupby(["capacity", "regularization"]).validation_error.mean())
        (capacity, regularization), error = best.idxmin(), best.min()
        meta = self.run.meta
        return (f"<div><b>gridplan grid</b> {escape(self.run.model_name)}: "
                f"{len(ok):,} fits of {len(cells):,} finished; best validation "
                f"{escape(str(meta.get('metric')))} {error:.3g} at "
                f"{escape(str(meta.get('capacity_param')))} {escape(value_label(capacity))}, "
                f"{escape(str(meta.get('regularization_param')))} "
                f"{escape(value_label(regularization))} with {int(ok.train_size.max()):,} rows."
                f"</div>")


def open_grid(run_dir: str | Path, model: str | None = None) -> Grid:
    """A run folder (from the CLI or `measure(..., store=...)`) as a Grid."""
    return Grid(open_run(run_dir, model=model))
