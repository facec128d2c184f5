"""The Python face of gridplan: load a config, run its grid, read a run back.

    >>> import gridplan.api as gp
    >>> run_dir = gp.run("configs/demo.toml")
    >>> cells = gp.open_run(run_dir).cells()
"""

from __future__ import annotations

import os
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING, Iterator, Sequence

from gridplan.common.checks import DEFAULT_BOOT, check_path_text, check_target
from gridplan.common.errors import GridplanError
from gridplan.common.files import replaced
from gridplan.measuring.config import Config, load_config, parse_config  # noqa: F401 (load_config is public)
from gridplan.measuring.runs import (  # noqa: F401 (public here as before)
    EXPORTS_KEY,
    LOCK_NAME,
    RUN_FILES,
    Run,
    model_index,
    open_run,
    refuse_run_file,
)
from gridplan.measuring.store import CONFIG_COPY, STORE_NAME, FoldRow, Store

if TYPE_CHECKING:   # the grid side (scikit-learn) is imported only where a grid is resolved
    from gridplan.measuring.spec import GridSpec, RunSpec

DEFAULT_OUTPUTS = Path("outputs")


def default_run_dir(config: Config) -> Path:
    """outputs/<run name> under the current directory."""
    return DEFAULT_OUTPUTS / config.name


def effective_jobs(config: Config, jobs: int | None) -> int:
    """Worker count: the option, else the config; -1 means every core."""
    from gridplan.measuring.config import check_jobs
    n = check_jobs(config.jobs if jobs is None else jobs, "jobs")
    return max(1, os.cpu_count() or 1) if n < 0 else n


@contextmanager
def run_lock(run_dir: Path) -> Iterator[None]:
    """Refuse a second run on the same folder while one is going."""
    import fcntl
    path = run_dir / LOCK_NAME
    try:
        handle = open(path, "a+")
    except OSError as exc:
        raise GridplanError(f"cannot write to run folder {run_dir}: {exc.strerror}.") from None
    try:
        fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        handle.close()
        raise GridplanError(f"another gridplan run is using {run_dir} right now; wait for it "
                            f"to finish or choose another folder with --out.") from None
    try:
        handle.seek(0)
        handle.truncate()
        handle.write(str(os.getpid()))
        handle.flush()
        yield
    finally:
        fcntl.flock(handle, fcntl.LOCK_UN)
        handle.close()


def prepare_run_dir(spec: RunSpec | GridSpec, run_dir: Path) -> Store:
    """Create or reopen the run folder; refuse one that holds a different grid."""
    spec = as_run_spec(spec)
    try:
        run_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise GridplanError(f"cannot create run folder {run_dir}: {exc.strerror}.") from None
    if not os.access(run_dir, os.W_OK):
        raise GridplanError(f"run folder {run_dir} is not writable.")
    store_path = run_dir / STORE_NAME
    existed = store_path.is_file()
    store = Store(store_path)
    identity = spec.measuring_identity()
    if existed:
        meta = store.meta()
        old = meta.get("identity")
        if old is not None and old != identity:
            store.close()
            raise GridplanError(
                f"{run_dir} holds a run of a different grid ({_difference(old, identity)} "
                f"changed); pass --out NEW_FOLDER for a new run, or delete the folder to start over.")
    c = spec.config
    models = [_model_meta(m) for m in spec.models]
    store.set_meta({
        "identity": identity, "fingerprint": spec.fingerprint(),
        "config_name": c.source.name, "data_path": str(c.data_path), "task": c.task,
        "metric": c.metric, "target_column": c.target,
        **{k: v for k, v in models[0].items() if k != "axes"},
        "models": models,
        "n_rows": spec.dataset.n_rows, "sizes": list(spec.sizes),
        "folds": c.folds, "repeats": c.repeats,
        "test_sizes": [int(len(f.test)) for f in spec.folds],
        "train_fold_sizes": [int(len(f.train)) for f in spec.folds],
    })
    store.set_axes(models[0]["axes"])
    (run_dir / CONFIG_COPY).write_text(c.text or "", encoding="utf-8")
    return store


def _model_meta(spec: GridSpec) -> dict:
    """One model's entry in the store meta: its names, parameters and axes."""
    c = spec.config
    return {"model": c.model_name, "model_label": spec.model_label, "family": spec.plan.family,
            "capacity_param": c.capacity.param if c.capacity.feature_sets is None else "features",
            "regularization_param": c.regularization.param,
            "axes": {"capacity": list(zip(c.capacity.labels, _values(c.capacity))),
                     "regularization": list(zip(c.regularization.labels,
                                                list(c.regularization.values))),
                     "size": [(str(m), m) for m in spec.sizes]}}


def _difference(old: dict, new: dict) -> str:
    from gridplan.measuring.spec import identity_difference
    return identity_difference(old, new)


def _values(axis) -> list:
    if axis.feature_sets is not None:
        return [list(s) for s in axis.feature_sets]
    return list(axis.values)


def run(config: Config | str | Path, *, out: str | Path | None = None, jobs: int | None = None,
        scheduler: str | None = None, allow_any_estimator: bool = False,
        progress=None, spec: RunSpec | GridSpec | None = None,
        ready: Sequence[Sequence[FoldRow]] = ()) -> Path:
    """Evaluate a config's grid (every model table), resuming an earlier partial run in the same folder.

    `ready` may hand over, per model table, rows fitted already on this very
    spec (the CLI's estimate probe); they are stored instead of fitted again.
    """
    from gridplan.measuring.runner import run_grid
    from gridplan.measuring.spec import resolve_run
    if not isinstance(config, Config):
        config = load_config(config)
    spec = as_run_spec(spec or resolve_run(config, allow_any_import=allow_any_estimator))
    run_dir = Path(out) if out is not None else default_run_dir(config)
    check_path_text(run_dir, "run folder")
    address = scheduler or config.scheduler
    with _locked(run_dir):
        prepare_run_dir(spec, run_dir).close()
        done_before = 0
        for index, model in enumerate(spec.models):
            store = Store(run_dir / STORE_NAME, model=index)
            step = _offset_progress(progress, done_before, spec.n_fits)
            try:
                if address:
                    from gridplan.measuring.cluster import run_on_cluster
                    run_on_cluster(model, store, address, progress=step)
                else:
                    run_grid(model, store, jobs=effective_jobs(config, jobs), progress=step,
                             ready=ready[index] if index < len(ready) else ())
            finally:
                store.close()
            done_before += model.n_fits
    return run_dir


def as_run_spec(spec: RunSpec | GridSpec) -> RunSpec:
    """A one-model GridSpec as a RunSpec; a RunSpec as it is."""
    from gridplan.measuring.spec import GridSpec, RunSpec
    return RunSpec(spec.config, (spec,)) if isinstance(spec, GridSpec) else spec


def _offset_progress(progress, before: int, total: int):
    """One model's progress (done, its total) reported as the whole run's (done, total)."""
    if progress is None:
        return None
    return lambda done, _own_total: progress(before + done, total)


@contextmanager
def _locked(run_dir: Path) -> Iterator[None]:
    try:
        run_dir.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise GridplanError(f"cannot create run folder {run_dir}: {exc.strerror}.") from None
    with run_lock(run_dir):
        yield


def export_cells(run_dir: str | Path, out: str | Path, *, force: bool = False) -> int:
    """Write the per-fold table as CSV (or Parquet by extension); returns the row count.

    The table goes to a temporary file beside `out` and is renamed into place,
    so a failed export leaves no half file. A run folder's own files are never
    replaced; any other existing file only when this run exported it before,
    or with `force`.
    """
    from gridplan.measuring.data import file_fingerprint
    run_dir, out = Path(run_dir), Path(out)
    run = open_run(run_dir)
    target = refuse_run_file(run_dir, out, run_dir / "cells.csv")
    if not target.parent.is_dir():
        raise GridplanError(f"cannot write {out}: the folder {target.parent} does not exist.")
    if target.is_dir():
        raise GridplanError(f"cannot write {out}: it is a folder; give a file name.")
    written = run.meta.get(EXPORTS_KEY, {})
    if target.exists() and not force:
        ours = target.is_file() and written.get(str(target)) == file_fingerprint(target)
        if not ours:
            raise GridplanError(f"{out} already exists and is not an earlier export of this run; "
                                f"pass --force to replace it.")
    frame = run.all_cells()
    try:
        with replaced(target) as temporary:
            if out.suffix.lower() in (".parquet", ".pq"):
                frame.to_parquet(temporary, index=False)
            else:
                frame.to_csv(temporary, index=False)
    except OSError as exc:
        raise GridplanError(f"cannot write {out}: {exc.strerror or exc}.") from None
    _remember_export(run_dir, target, file_fingerprint(target))
    return len(frame)


def _remember_export(run_dir: Path, target: Path, digest: str) -> None:
    """Note an export in the store so a later export may replace it; skipped when read-only."""
    import sqlite3
    try:
        with Store.open_existing(run_dir) as store:
            written = store.meta().get(EXPORTS_KEY, {})
            written[str(target)] = digest
            store.set_meta({EXPORTS_KEY: written})
    except (sqlite3.Error, GridplanError):
        pass


def check(config: Config | str | Path, *, allow_any_estimator: bool = False) -> RunSpec:
    """Validate a config against its data and return the resolved grid of every model table."""
    if not isinstance(config, Config):
        config = load_config(config)
    from gridplan.measuring.spec import resolve_run
    return resolve_run(config, allow_any_import=allow_any_estimator)


def fit_curves(run_dir: str | Path, *, n_boot: int = DEFAULT_BOOT, seed: int = 0,
               model: str | int | None = None):
    """Fit a learning curve per setting of a run's model (see gridplan.deciding.gridfit.fit_grid)."""
    from gridplan.deciding.curvestore import run_curves
    return run_curves(run_dir, n_boot=n_boot, seed=seed, model=model)


def curves_report(run_dir: str | Path, *, target: float | None = None,
                  confidence: float | None = None, n_boot: int = DEFAULT_BOOT, seed: int = 0,
                  model: str | int | None = None):
    """Per-setting curve summary of one model (a gridplan.common.results.CurvesSummary) (family, noise floor, forecasts, samples needed)."""
    from gridplan.deciding.gridfit import curves_summary
    run = open_run(run_dir, model=model)
    if target is None and run.config is not None:
        target = run.config.target_error
    if confidence is None:
        confidence = run.config.confidence if run.config is not None else 0.9
    if target is not None:
        check_target(target)
    fits = fit_curves(run_dir, n_boot=n_boot, seed=seed, model=run.model)
    import dataclasses
    summary = curves_summary(fits, target=target, confidence=confidence)
    return dataclasses.replace(summary, metric=run.meta.get("metric"), model=run.model_name)
