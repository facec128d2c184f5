"""Evaluate a grid: split it into tasks, run them in parallel, stream rows to the store.

A task is the unit a worker runs. Plain tasks fit one pipeline for one
(capacity, regularisation, size, fold). Fast-path tasks cover many cells at
once (every alpha and degree of one training subset; every depth of one tree)
and give the same numbers as the plain fits (see `gridplan.measuring.fastpaths`).
"""

from __future__ import annotations

import signal
import threading
import time
import warnings
from contextlib import contextmanager, nullcontext
from dataclasses import dataclass
from typing import Callable, Iterator, NamedTuple

import numpy as np

from gridplan.common import metrics
from gridplan.measuring.families import ModelPlan, build_model, make_encoder, needs_encoder
from gridplan.measuring.spec import GridSpec
from gridplan.measuring.store import FoldRow, Store

ProgressCallback = Callable[[int, int], None]   # (fits done, fits total)

FLUSH_SECONDS = 0.5
FLUSH_ROWS = 500
#: Estimated one-core seconds of remaining work below which a local run with
#: jobs > 1 stays in this process instead of starting worker processes.
LOCAL_ONLY_SECONDS = 3.0
#: Largest polynomial feature table built once and shared by a run's ridge tasks.
SHARED_FEATURES_MAX_BYTES = 512 * 2 ** 20


@dataclass(frozen=True)
class Task:
    """Cells one worker computes together."""

    kind: str                          # "plain", "ridge-path" or "tree-path"
    capacity_indices: tuple[int, ...]
    regularization_indices: tuple[int, ...]
    size_index: int
    fold_index: int

    @property
    def n_fits(self) -> int:
        return len(self.capacity_indices) * len(self.regularization_indices)


@dataclass(frozen=True)
class Workload:
    """What every task needs; sent to workers once per batch (or once per cluster)."""

    X: object                # DataFrame, or a float array when no encoding is needed
    y: np.ndarray
    labels: np.ndarray | None
    plan: ModelPlan
    folds: tuple
    sizes: tuple[int, ...]
    metric: str
    fit_time_limit: float | None = None
    #: Polynomial features of every row of X at the largest degree, built once
    #: for ridge fast-path tasks that share this process (see with_shared_features).
    poly_features: np.ndarray | None = None
    #: Per-row weights for fits and errors ([data] weights, measure(sample_weight=...)).
    weights: np.ndarray | None = None


def workload_of(spec: GridSpec) -> Workload:
    """The data and grid a worker needs; a plain float array when no encoding is needed."""
    X = spec.dataset.X
    if not needs_encoder(spec.plan) and spec.plan.prototype is None:
        X = X.to_numpy(dtype=float)
    return Workload(X=X, y=spec.dataset.y, labels=spec.dataset.labels,
                    plan=spec.plan, folds=spec.folds, sizes=spec.sizes,
                    metric=spec.config.metric, fit_time_limit=spec.config.fit_time_limit,
                    weights=spec.dataset.weights)


def fast_path_kind(plan: ModelPlan, metric: str) -> str | None:
    """Which fast path a grid can take, or None for plain fits."""
    from gridplan.measuring.fastpaths import has_fast_path, tree_params_commute
    if plan.family is None:
        return None
    if not has_fast_path(plan.family, plan.regularization_param, plan.task, metric):
        return None
    if plan.family == "poly-ridge" and set(plan.params) <= {"degree", "alpha"}:
        return "ridge-path"
    if plan.family == "tree" and plan.feature_sets is None:
        fixed = {k: v for k, v in plan.params.items() if k != "random_state"}
        if tree_params_commute(fixed):
            return "tree-path"
    return None


def build_tasks(spec: GridSpec, done: set[tuple[int, int, int, int, int]]) -> list[Task]:
    """Tasks covering every cell x fold not yet finished."""
    plan = spec.plan
    n_cap, n_reg = len(plan.capacity_values), len(plan.regularization_values)
    kind = (fast_path_kind(plan, spec.config.metric)
            if spec.config.fast_path and spec.dataset.weights is None else None)
    tasks = []
    for size_index in reversed(range(len(spec.sizes))):   # largest first: a shorter tail
        for fold_index, fold in enumerate(spec.folds):
            def missing(ci: int, ri: int) -> bool:
                return (ci, ri, size_index, fold.repeat, fold.fold) not in done
            if kind == "ridge-path":
                groups = ([tuple(range(n_cap))] if plan.feature_sets is None
                          else [(ci,) for ci in range(n_cap)])
                for caps in groups:
                    if any(missing(ci, ri) for ci in caps for ri in range(n_reg)):
                        tasks.append(Task(kind, caps, tuple(range(n_reg)), size_index, fold_index))
            elif kind == "tree-path":
                for ri in range(n_reg):
                    if any(missing(ci, ri) for ci in range(n_cap)):
                        tasks.append(Task(kind, tuple(range(n_cap)), (ri,), size_index, fold_index))
            else:
                for ci in range(n_cap):
                    for ri in range(n_reg):
                        if missing(ci, ri):
                            tasks.append(Task("plain", (ci,), (ri,), size_index, fold_index))
    return tasks


_CONTROLLER = None
_LIMITED_BY_CALLER = False   # True while worker threads run under one process-wide limit


def _one_blas_thread():
    """A context that limits BLAS/OpenMP to one thread (the same numbers on any worker).

    The limit is process-wide, so worker threads must not each set and restore
    it: while they run, the calling thread holds one limit for all of them.
    """
    global _CONTROLLER
    from threadpoolctl import ThreadpoolController
    if _LIMITED_BY_CALLER:
        return nullcontext()
    if _CONTROLLER is None:
        # The controller sees only the BLAS libraries loaded when it is made:
        # SciPy brings its own (the ridge path's QR), so load it first.
        import scipy.linalg  # noqa: F401
        _CONTROLLER = ThreadpoolController()
    return _CONTROLLER.limit(limits=1)


THREADED_KINDS = ("ridge-path",)   # tree-path tasks are too small to gain from threads


def with_shared_features(tasks: list[Task], work: Workload) -> Workload:
    """The workload with its rows' polynomial features built once, when ridge tasks can share them.

    Only for tasks run in this process (threads or one by one): the features
    are as large as the largest task's, and worth sending nowhere.
    """
    plan = work.plan
    shareable = (tasks and all(t.kind == "ridge-path" for t in tasks) and plan.feature_sets is None
                 and isinstance(work.X, np.ndarray))
    if not shareable or work.poly_features is not None:
        return work
    from dataclasses import replace

    from gridplan.measuring.fastpaths import n_poly_columns, polynomial_features
    top = max(int(plan.capacity_values[ci]) for t in tasks for ci in t.capacity_indices)
    if work.X.shape[0] * n_poly_columns(work.X.shape[1], top) * 8 > SHARED_FEATURES_MAX_BYTES:
        return work       # each task builds its own rows' features instead
    return replace(work, poly_features=polynomial_features(work.X, top))


def _in_threads(tasks: list[Task], work: Workload, jobs: int) -> Iterator[list[FoldRow]]:
    """Run ridge fast-path tasks on `jobs` threads of this process.

    Their time goes to LAPACK and compiled tree code, which release the GIL,
    and threads start at once, whereas each worker process first spends about
    a second and a half importing scikit-learn.
    """
    global _LIMITED_BY_CALLER
    from joblib import Parallel, delayed
    with _one_blas_thread():
        _LIMITED_BY_CALLER = True
        try:
            parallel = Parallel(n_jobs=jobs, backend="threading",
                                return_as="generator_unordered", batch_size=1)
            yield from parallel(delayed(run_task)(task, work) for task in tasks)
        finally:
            _LIMITED_BY_CALLER = False


class FitTimeout(Exception):
    """A fit ran past the config's fit_time_limit."""


@contextmanager
def _time_limit(seconds: float | None, n_fits: int) -> Iterator[None]:
    """Raise FitTimeout after seconds x n_fits, where the platform allows it.

    Uses SIGALRM, so it works in a process's main thread (local workers, a
    sequential run); a fit stuck inside compiled code is stopped as soon as it
    returns to Python. Elsewhere (threads of a dask worker) no limit applies.
    """
    usable = (seconds is not None and hasattr(signal, "setitimer")
              and threading.current_thread() is threading.main_thread())
    if not usable:
        yield
        return
    limit = seconds * max(1, n_fits)

    def on_alarm(signum, frame):
        raise FitTimeout(f"fit exceeded the time limit of {seconds:g} s")

    previous = signal.signal(signal.SIGALRM, on_alarm)
    signal.setitimer(signal.ITIMER_REAL, limit)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)


def run_tasks(tasks: tuple[Task, ...], work: Workload) -> list[FoldRow]:
    """Run several tasks in one call (fewer round trips on a cluster)."""
    return [row for task in tasks for row in run_task(task, work)]


def run_task(task: Task, work: Workload) -> list[FoldRow]:
    """Compute one task's rows; a failure is recorded per row, never raised."""
    from joblib import parallel_config
    fold = work.folds[task.fold_index]
    size = work.sizes[task.size_index]
    with _one_blas_thread(), warnings.catch_warnings(), parallel_config(backend="sequential"):
        warnings.simplefilter("ignore")
        started = time.perf_counter()
        try:
            with _time_limit(work.fit_time_limit, task.n_fits):
                if task.kind == "ridge-path":
                    results = _ridge_path(task, work, fold, size)
                elif task.kind == "tree-path":
                    results = _tree_path(task, work, fold, size)
                else:
                    results = {(task.capacity_indices[0], task.regularization_indices[0]):
                               _plain_fit(task, work, fold, size)}
        except Exception as exc:  # one failing task (or a timeout) never stops the run
            message = f"{type(exc).__name__}: {str(exc).strip().splitlines()[0] if str(exc).strip() else ''}"
            results = {(ci, ri): (None, None, "failed", "plain" if task.kind == "plain" else task.kind,
                                  message[:500])
                       for ci in task.capacity_indices for ri in task.regularization_indices}
        elapsed = time.perf_counter() - started
    per_fit = elapsed / max(1, len(results))
    return [FoldRow(capacity_index=ci, regularization_index=ri, size_index=task.size_index,
                    repeat=fold.repeat, fold=fold.fold, train_size=size,
                    train_error=tr, validation_error=va, fit_seconds=per_fit,
                    status=status, path=path, message=note)
            for (ci, ri), (tr, va, status, path, note) in sorted(results.items())]


def _errors(model, work: Workload, X_fit, y_fit, X_val, y_val, w_fit=None,
            w_val=None) -> tuple[float, float]:
    """Training error on the fitted rows and validation error on the held-out rows (weighted when given)."""
    if work.metric not in metrics.ALL_METRICS:          # a scikit-learn scorer
        return (metrics.scorer_error(work.metric, model, X_fit, y_fit, w_fit),
                metrics.scorer_error(work.metric, model, X_val, y_val, w_val))
    if metrics.needs_proba(work.metric):
        p_fit = metrics.proba_for_labels(model, X_fit, work.labels)
        p_val = metrics.proba_for_labels(model, X_val, work.labels)
    else:
        p_fit, p_val = model.predict(X_fit), model.predict(X_val)
    return (metrics.error_of(work.metric, y_fit, p_fit, work.labels, w_fit),
            metrics.error_of(work.metric, y_val, p_val, work.labels, w_val))


def _fit_weighted(model, X, y, weights) -> None:
    """Fit, passing per-row weights to the final estimator (through a Pipeline's last step)."""
    if weights is None:
        model.fit(X, y)
    elif hasattr(model, "steps"):
        model.fit(X, y, **{f"{model.steps[-1][0]}__sample_weight": weights})
    else:
        model.fit(X, y, sample_weight=weights)


def _plain_fit(task: Task, work: Workload, fold, size: int):
    ci, ri = task.capacity_indices[0], task.regularization_indices[0]
    rows = fold.train[:size]
    X_fit, y_fit = _take(work.X, rows), work.y[rows]
    X_val, y_val = _take(work.X, fold.test), work.y[fold.test]
    model = build_model(work.plan, ci, ri, check=False)
    weights = work.weights
    w_fit, w_val = (None, None) if weights is None else (weights[rows], weights[fold.test])
    _fit_weighted(model, X_fit, y_fit, w_fit)
    train_error, validation_error = _errors(model, work, X_fit, y_fit, X_val, y_val, w_fit, w_val)
    return train_error, validation_error, "ok", "plain", ""


def _take(X, rows: np.ndarray):
    """Rows of a DataFrame or an array."""
    return X.iloc[rows] if hasattr(X, "iloc") else X[rows]


def _encoded(work: Workload, capacity_index: int, fold, size: int):
    """Encode the training subset and held-out rows with an encoder fitted on the subset."""
    rows = fold.train[:size]
    encoder = make_encoder(work.plan, capacity_index)
    X_fit, X_val = _take(work.X, rows), _take(work.X, fold.test)
    if encoder is not None:
        X_fit = encoder.fit_transform(X_fit)
        X_val = encoder.transform(X_val)
    return (np.asarray(X_fit, dtype=float), work.y[rows], np.asarray(X_val, dtype=float),
            work.y[fold.test])


def _cell(fast) -> tuple:
    return (fast.train_error, fast.validation_error, "ok", fast.path, fast.note)


def _ridge_path(task: Task, work: Workload, fold, size: int) -> dict:
    from gridplan.measuring.fastpaths import poly_ridge_grid
    plan = work.plan
    Z_fit, y_fit, Z_val, y_val = _encoded(work, task.capacity_indices[0], fold, size)
    if plan.feature_sets is None:
        degrees = [int(plan.capacity_values[ci]) for ci in task.capacity_indices]
    else:
        degrees = [int(plan.params.get("degree", 1))]
    alphas = [float(plan.regularization_values[ri]) if plan.regularization_param
              else float(plan.params.get("alpha", 1.0)) for ri in task.regularization_indices]
    features = None
    if work.poly_features is not None:
        features = (work.poly_features[fold.train[:size]], work.poly_features[fold.test])
    grid = poly_ridge_grid(Z_fit, y_fit, Z_val, y_val, degrees, alphas, task=plan.task,
                           metric=work.metric, labels=work.labels, features=features)
    out = {}
    for i, ci in enumerate(task.capacity_indices):
        row = grid[i] if plan.feature_sets is None else grid[0]
        for j, ri in enumerate(task.regularization_indices):
            out[(ci, ri)] = _cell(row[j])
    return out


def _tree_path(task: Task, work: Workload, fold, size: int) -> dict:
    from gridplan.measuring.fastpaths import tree_depth_grid
    plan = work.plan
    ri = task.regularization_indices[0]
    Z_fit, y_fit, Z_val, y_val = _encoded(work, 0, fold, size)
    params = plan.setting_params(0, ri)
    params.pop(plan.capacity_param, None)
    random_state = params.pop("random_state", plan.seed)
    depths = [int(plan.capacity_values[ci]) for ci in task.capacity_indices]
    cells = tree_depth_grid(Z_fit, y_fit, Z_val, y_val, depths, task=plan.task,
                            metric=work.metric, labels=work.labels, tree_params=params,
                            random_state=random_state)
    return {(ci, ri): _cell(cells[i]) for i, ci in enumerate(task.capacity_indices)}


def chunked(tasks: list[Task], size: int) -> list[tuple[Task, ...]]:
    """Group tasks into chunks of `size` (larger units of work for a cluster)."""
    return [tuple(tasks[i:i + size]) for i in range(0, len(tasks), size)]


def _head_start(tasks: list[Task], work: Workload) -> Iterator[list[FoldRow]]:
    """Run the largest task here; if the rest is small, run it here too. Returns what is left for a pool.

    Each local worker process imports scikit-learn before its first task
    (about 1.5 s of one core on a quiet 2-core machine), so a pool only pays
    for itself when the remaining one-core work exceeds about LOCAL_ONLY_SECONDS.
    The rest is estimated from the probe, taking work as proportional to
    training rows x fits, as estimate_seconds does.
    """
    if not tasks:
        return []
    probe = max(range(len(tasks)), key=lambda i: (work.sizes[tasks[i].size_index], tasks[i].n_fits))
    started = time.process_time()   # one core's seconds, less disturbed by a busy machine
    rows = run_task(tasks[probe], work)
    seconds = time.process_time() - started
    yield rows
    rest = tasks[:probe] + tasks[probe + 1:]
    probe_work = work.sizes[tasks[probe].size_index] * tasks[probe].n_fits
    estimate = seconds * sum(work.sizes[t.size_index] * t.n_fits for t in rest) / probe_work
    if estimate >= LOCAL_ONLY_SECONDS:
        return rest
    for task in rest:
        yield run_task(task, work)
    return []


def execute(tasks: list[Task], work: Workload, *, jobs: int = 1, backend: str | None = None,
            backend_options: dict | None = None, chunk: int = 1) -> Iterator[list[FoldRow]]:
    """Yield the rows of each task (or chunk of tasks) as it finishes, in any order.

    Locally this uses joblib's loky backend with one BLAS thread per worker;
    `backend="dask"` sends the same work to a dask cluster (see gridplan.measuring.cluster).
    """
    if jobs == 1 and backend is None:
        work = with_shared_features(tasks, work)
        for task in tasks:
            yield run_task(task, work)
        return
    if backend is None and tasks and all(t.kind in THREADED_KINDS for t in tasks):
        yield from _in_threads(list(tasks), with_shared_features(tasks, work), jobs)
        return
    if backend is None:
        tasks = yield from _head_start(list(tasks), work)
        if not tasks:
            return
    from joblib import Parallel, delayed, parallel_config
    options = dict(backend_options or {})
    if backend in (None, "loky"):
        options.setdefault("inner_max_num_threads", 1)
    if backend in ("dask", "gridplan-dask"):
        options.setdefault("scatter", [work])   # one copy per worker, not one per task
    with parallel_config(backend=backend or "loky", n_jobs=jobs, **options):
        parallel = Parallel(return_as="generator_unordered", batch_size="auto")
        if chunk > 1:
            yield from parallel(delayed(run_tasks)(group, work) for group in chunked(tasks, chunk))
        else:
            yield from parallel(delayed(run_task)(task, work) for task in tasks)


def run_grid(spec: GridSpec, store: Store, *, jobs: int = 1, backend: str | None = None,
             backend_options: dict | None = None, chunk: int = 1,
             progress: ProgressCallback | None = None, ready: list[FoldRow] = ()) -> int:
    """Run every unfinished task, writing rows to the store as they arrive.

    `ready` holds rows fitted already for this grid (estimate_seconds' probe);
    they are stored first and not fitted again. Returns the number of fits
    written. On interruption every finished row has already been committed.
    """
    done = store.finished_keys()
    keep = [r for r in ready if (r.capacity_index, r.regularization_index, r.size_index,
                                 r.repeat, r.fold) not in done]
    written = store.write_rows(keep)
    done = store.finished_keys() if keep else done
    tasks = build_tasks(spec, done)
    total = spec.n_fits
    finished = len(done)
    if progress:
        progress(finished, total)
    work = workload_of(spec)
    buffer: list[FoldRow] = []
    last_flush = time.monotonic()
    try:
        for rows in execute(tasks, work, jobs=jobs, backend=backend,
                            backend_options=backend_options, chunk=chunk):
            fresh = [r for r in rows if (r.capacity_index, r.regularization_index, r.size_index,
                                         r.repeat, r.fold) not in done]
            buffer.extend(fresh)
            finished += len(fresh)
            if len(buffer) >= FLUSH_ROWS or time.monotonic() - last_flush > FLUSH_SECONDS:
                written += store.write_rows(buffer)
                buffer, last_flush = [], time.monotonic()
            if progress:
                progress(finished, total)
    finally:
        written += store.write_rows(buffer)
    return written


class Estimate(NamedTuple):
    """What the timed probe of a grid found, and the rows it fitted (for the run to keep)."""

    seconds: float          # rough wall time of the unfinished grid
    probe_seconds: float    # wall time of the probe
    probe_tasks: int        # tasks timed side by side in it
    rows: list[FoldRow]


def estimate_seconds(spec: GridSpec, jobs: int,
                     done: set[tuple[int, int, int, int, int]] | None = None) -> Estimate:
    """Rough wall time of the unfinished grid from timed tasks at the largest size.

    The probe's rows come back so that a run can keep them instead of fitting
    them again; nothing is timed when nothing is left to run. Tasks that run
    on threads are probed `jobs` at a time, side by side as the run will run
    them, so no core idles while the estimate is taken; others one at a time
    in this process. Work is taken as proportional to the training size, which
    holds roughly for the built-in families.
    """
    tasks = build_tasks(spec, done or set())
    if not tasks:
        return Estimate(0.0, 0.0, 0, [])
    largest = max(t.size_index for t in tasks)
    candidates = sorted((t for t in tasks if t.size_index == largest),
                        key=lambda t: (max(t.capacity_indices), -min(t.regularization_indices)),
                        reverse=True)
    threaded = jobs > 1 and candidates[0].kind in THREADED_KINDS
    probes = candidates[:jobs] if threaded else candidates[:1]
    work = workload_of(spec)
    started = time.perf_counter()
    if threaded:
        rows = [row for batch in execute(probes, work, jobs=jobs) for row in batch]
    else:
        rows = run_task(probes[0], work)
    probe_seconds = time.perf_counter() - started
    # each probe had a core of its own, as each of the run's tasks will
    scale = float(np.mean([spec.sizes[t.size_index] for t in tasks])) / spec.sizes[largest]
    return Estimate(probe_seconds * len(tasks) * scale / max(1, jobs), probe_seconds,
                    len(probes), rows)
