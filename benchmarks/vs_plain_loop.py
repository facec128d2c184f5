"""Time gridplan against the plain scikit-learn loop on the same grid, splits and machine.

    python benchmarks/vs_plain_loop.py [--quick] [--repeats 3] [--plain-repeats 1]

The plain loop calls scikit-learn's ``learning_curve`` once per grid setting
(n_jobs=2) with the folds and nested training subsets gridplan uses:
``cv=[(ordered training rows, held-out rows)]``, absolute ``train_sizes`` and
``shuffle=False``, so the subset of size m is ``train[:m]`` in both. gridplan
runs the same grid through ``gridplan.api.run(jobs=2)`` into a fresh folder.
Both timings start from a stopped worker pool, so any pool start is timed
(gridplan starts one only when its estimate of the work warrants it).

Standard grids (3 raw inputs, n = 2000, 8 training sizes, 5 folds):
  tree: DecisionTreeRegressor, max_depth 1-15
  ridge: PolynomialFeatures -> StandardScaler -> Ridge, degree 1-10,
         12 alphas log-spaced 1e-6 .. 1e3
``--quick`` shrinks both (n = 600, degrees 1-6, 6 alphas, depths 1-8, 5 sizes).

``--whole-process`` times both sides as fresh processes instead, start-up
included: ``python -m gridplan run CONFIG`` against a script that imports
scikit-learn and runs the same ``learning_curve`` loop on the same folds
(handed over in a .npz file), on the ridge grid at n = 8,000 (10 degrees x 12
alphas x 10 sizes up to 6,400 rows x 5 folds = 6,000 fits). It also prints
gridplan's start-up: a fresh process importing what ``run`` needs, and
``gridplan --help``.

Prints one line per grid; the last line is the ridge grid's
``ratio=<plain / gridplan> max_rel_diff=<largest relative difference>``.
"""

from __future__ import annotations

import argparse
import statistics
import subprocess
import sys
import tempfile
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np

N_JOBS = 2


@dataclass(frozen=True)
class Grid:
    """One benchmark grid."""

    family: str                 # "poly-ridge" or "tree"
    n_rows: int
    capacities: tuple[int, ...]
    alphas: tuple[float, ...]   # empty for the tree grid
    size_count: int
    folds: int = 5


def standard_grids(quick: bool) -> tuple[Grid, Grid]:
    """(tree grid, ridge grid) of the benchmark."""
    if quick:
        return (Grid("tree", 600, tuple(range(1, 9)), (), 5),
                Grid("poly-ridge", 600, tuple(range(1, 7)), tuple(np.logspace(-6, 3, 6)), 5))
    return (Grid("tree", 2000, tuple(range(1, 16)), (), 8),
            Grid("poly-ridge", 2000, tuple(range(1, 11)), tuple(np.logspace(-6, 3, 12)), 8))


def synthetic_data(n_rows: int, seed: int = 0):
    """A smooth non-linear function of three inputs plus Gaussian noise (sigma 0.3)."""
    import pandas as pd

    rng = np.random.default_rng(seed)
    x = rng.uniform(-1.0, 1.0, size=(n_rows, 3))
    signal = np.sin(3.0 * x[:, 0]) + x[:, 1] ** 2 - x[:, 0] * x[:, 2] + 0.5 * np.exp(x[:, 2])
    frame = pd.DataFrame(x, columns=["x1", "x2", "x3"])
    frame["y"] = signal + rng.normal(scale=0.3, size=n_rows)
    return frame


def write_config(folder: Path, grid: Grid) -> Path:
    """Data file and config for one grid; returns the config path."""
    synthetic_data(grid.n_rows).to_csv(folder / "data.csv", index=False)
    capacity_param = "degree" if grid.family == "poly-ridge" else "max_depth"
    lines = ["[data]", 'path = "data.csv"', 'target = "y"', "",
             "[model]", f'family = "{grid.family}"',
             f'capacity = {{ param = "{capacity_param}", values = {list(grid.capacities)} }}']
    if grid.alphas:
        values = ", ".join(repr(float(a)) for a in grid.alphas)
        lines.append(f'regularization = {{ param = "alpha", values = [{values}] }}')
    lines += ["", "[sizes]", f"count = {grid.size_count}", "",
              "[resampling]", f"folds = {grid.folds}", "repeats = 1", "seed = 3", "",
              "[goal]", 'metric = "mse"', ""]
    path = folder / f"{grid.family}.toml"
    path.write_text("\n".join(lines), encoding="utf-8")
    return path


def stop_worker_pool() -> None:
    """Shut joblib's reusable process pool down, so the next timing includes its start."""
    from joblib.externals.loky import get_reusable_executor

    get_reusable_executor().shutdown(wait=True)


def plain_loop(spec, grid: Grid) -> dict[tuple[int, int], np.ndarray]:
    """learning_curve per grid setting; (capacity index, regularization index) -> (2, sizes, folds)."""
    from sklearn.linear_model import Ridge
    from sklearn.model_selection import learning_curve
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import PolynomialFeatures, StandardScaler
    from sklearn.tree import DecisionTreeRegressor

    X = spec.dataset.X.to_numpy(dtype=float)
    y = spec.dataset.y
    cv = [(fold.train, fold.test) for fold in spec.folds]
    out = {}
    for ci, capacity in enumerate(grid.capacities):
        for ri, alpha in enumerate(grid.alphas or (None,)):
            if grid.family == "poly-ridge":
                model = make_pipeline(PolynomialFeatures(capacity, include_bias=False),
                                      StandardScaler(), Ridge(alpha=alpha))
            else:
                model = DecisionTreeRegressor(max_depth=capacity, random_state=spec.plan.seed)
            _, train, test = learning_curve(model, X, y, cv=cv, train_sizes=list(spec.sizes),
                                            shuffle=False, scoring="neg_mean_squared_error",
                                            n_jobs=N_JOBS)
            out[(ci, ri)] = -np.stack([train, test])
    return out


def gridplan_run(config_path: Path, folder: Path) -> dict[tuple[int, int], np.ndarray]:
    """gridplan.api.run into a fresh folder; the same layout as plain_loop's result."""
    from gridplan import api

    run_dir = api.run(config_path, out=folder, jobs=N_JOBS)
    cells = api.open_run(run_dir).cells()
    n_sizes, n_folds = cells["size_index"].max() + 1, cells["fold"].max() + 1
    out = {}
    for (ci, ri), group in cells.groupby(["capacity_index", "regularization_index"]):
        errors = np.full((2, n_sizes, n_folds), np.nan)
        errors[0, group["size_index"], group["fold"]] = group["train_error"]
        errors[1, group["size_index"], group["fold"]] = group["validation_error"]
        out[(int(ci), int(ri))] = errors
    return out


def max_rel_diff(ours: np.ndarray, reference: np.ndarray) -> float:
    """Largest |ours - reference| / |reference| (absolute where the reference is 0)."""
    scale = np.where(reference == 0.0, 1.0, np.abs(reference))
    return float(np.max(np.abs(ours - reference) / scale))


def timed(fn, repeats: int):
    """(list of wall times, last result) of repeats calls; the worker pool is stopped before each."""
    times, result = [], None
    for _ in range(repeats):
        stop_worker_pool()
        started = time.perf_counter()
        result = fn()
        times.append(time.perf_counter() - started)
    return times, result


def spread(times: list[float]) -> str:
    best = min(times)
    if len(times) == 1:
        return f"{best:.2f} s"
    return f"{best:.2f} s (best of {len(times)}; median {statistics.median(times):.2f}, worst {max(times):.2f})"


def bench(grid: Grid, folder: Path, repeats: int, plain_repeats: int) -> str:
    """Run one grid both ways; returns its summary line."""
    from gridplan.api import check

    config_path = write_config(folder, grid)
    spec = check(config_path)
    runs = iter(range(repeats))
    ours_times, ours = timed(lambda: gridplan_run(config_path, folder / f"run-{grid.family}-{next(runs)}"),
                             repeats)
    plain_times, plain = timed(lambda: plain_loop(spec, grid), plain_repeats)
    stop_worker_pool()

    train = [max_rel_diff(ours[key][0], plain[key][0]) for key in plain]
    validation = [max_rel_diff(ours[key][1], plain[key][1]) for key in plain]
    ratio = min(plain_times) / min(ours_times)
    print(f"{grid.family}: {len(grid.capacities)} capacities x {max(1, len(grid.alphas))} "
          f"regularisation x {len(spec.sizes)} sizes {list(spec.sizes)} x {grid.folds} folds = "
          f"{spec.n_fits} fits, n = {grid.n_rows}")
    print(f"  plain loop (learning_curve, n_jobs={N_JOBS}): {spread(plain_times)}")
    print(f"  gridplan (api.run, jobs={N_JOBS}, from a stopped pool): {spread(ours_times)}")
    if grid.family == "tree":
        n_cells = sum(plain[k][0].size for k in plain)
        bitwise = int(sum(np.sum(ours[k][0] == plain[k][0]) for k in plain))
        close = int(sum(np.sum(np.isclose(ours[k][0], plain[k][0], rtol=1e-12, atol=0)) for k in plain))
        same_val = int(sum(np.sum(ours[k][1] == plain[k][1]) for k in plain))
        print(f"  training errors: {bitwise}/{n_cells} cells bit for bit, {close}/{n_cells} within 1e-12; "
              f"validation errors: {same_val}/{n_cells} cells bit for bit (the rest differ by tie-breaking)")
        return f"tree ratio={ratio:.1f} train_max_rel_diff={max(train):.1e} validation_max_rel_diff={max(validation):.1e}"
    return f"ratio={ratio:.1f} max_rel_diff={max(max(train), max(validation)):.1e}"


PLAIN_SCRIPT = """
import sys
import numpy as np
from sklearn.linear_model import Ridge
from sklearn.model_selection import learning_curve
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import PolynomialFeatures, StandardScaler

data = np.load(sys.argv[1])
X, y, sizes = data["X"], data["y"], [int(s) for s in data["sizes"]]
cv = [(data[f"train{k}"], data[f"test{k}"]) for k in range(int(data["folds"]))]
out = []
for degree in data["degrees"]:
    for alpha in data["alphas"]:
        model = make_pipeline(PolynomialFeatures(int(degree), include_bias=False), StandardScaler(),
                              Ridge(alpha=float(alpha)))
        _, train, test = learning_curve(model, X, y, cv=cv, train_sizes=sizes, shuffle=False,
                                        scoring="neg_mean_squared_error", n_jobs=int(data["jobs"]))
        out.append(-np.stack([train, test]))
np.save(sys.argv[2], np.stack(out))
"""


def fresh(args: list[str], cwd: Path) -> float:
    """Wall time of one fresh process, output discarded."""
    started = time.perf_counter()
    subprocess.run(args, cwd=cwd, check=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    return time.perf_counter() - started


def whole_process(folder: Path, repeats: int, plain_repeats: int) -> str:
    """The 6,000-fit ridge grid at n = 8,000, both sides as whole processes."""
    from gridplan.api import check, open_run

    grid = Grid("poly-ridge", 8000, tuple(range(1, 11)), tuple(np.logspace(-6, 3, 12)), 10)
    config_path = write_config(folder, grid)
    spec = check(config_path)
    folds = {f"train{k}": fold.train for k, fold in enumerate(spec.folds)}
    folds |= {f"test{k}": fold.test for k, fold in enumerate(spec.folds)}
    np.savez(folder / "plain.npz", X=spec.dataset.X.to_numpy(dtype=float), y=spec.dataset.y,
             sizes=np.asarray(spec.sizes), folds=len(spec.folds), degrees=np.asarray(grid.capacities),
             alphas=np.asarray(grid.alphas), jobs=N_JOBS, **folds)
    (folder / "plain.py").write_text(PLAIN_SCRIPT, encoding="utf-8")
    python = sys.executable
    imports = "from gridplan import api; from gridplan.measuring import runner"
    start_up = min(fresh([python, "-c", imports], folder) for _ in range(3))
    help_time = min(fresh([python, "-m", "gridplan", "--help"], folder) for _ in range(3))
    ours = []
    for k in range(repeats):
        stop_worker_pool()
        ours.append(fresh([python, "-m", "gridplan", "run", str(config_path), "--out",
                           str(folder / f"whole-{k}"), "--jobs", str(N_JOBS)], folder))
    plain = [fresh([python, str(folder / "plain.py"), str(folder / "plain.npz"),
                    str(folder / "plain.npy")], folder) for _ in range(plain_repeats)]
    reference = np.load(folder / "plain.npy")
    cells = open_run(folder / "whole-0").cells()
    worst = 0.0
    for n, (ci, ri) in enumerate((c, r) for c in range(len(grid.capacities)) for r in range(len(grid.alphas))):
        rows = cells[(cells["capacity_index"] == ci) & (cells["regularization_index"] == ri)]
        for side, column in enumerate(("train_error", "validation_error")):
            errors = np.full(reference.shape[2:], np.nan)
            errors[rows["size_index"], rows["fold"]] = rows[column]
            worst = max(worst, max_rel_diff(errors, reference[n, side]))
    ratio = min(plain) / min(ours)
    print(f"whole processes: poly-ridge {len(grid.capacities)} degrees x {len(grid.alphas)} alphas x "
          f"{len(spec.sizes)} sizes {list(spec.sizes)} x {grid.folds} folds = {spec.n_fits} fits, "
          f"n = {grid.n_rows}")
    print(f"  start-up: imports for run {start_up:.2f} s, gridplan --help {help_time:.2f} s (best of 3)")
    print(f"  plain loop script (learning_curve, n_jobs={N_JOBS}): {spread(plain)}")
    print(f"  python -m gridplan run --jobs {N_JOBS}: {spread(ours)}")
    return f"whole-process ratio={ratio:.1f} max_rel_diff={worst:.1e} start_up={start_up:.2f}s"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller grids, under a minute")
    parser.add_argument("--repeats", type=int, default=3, help="gridplan runs per grid (best counts)")
    parser.add_argument("--plain-repeats", type=int, default=1, help="plain-loop runs per grid")
    parser.add_argument("--only", choices=("tree", "poly-ridge"), help="run one grid only")
    parser.add_argument("--whole-process", action="store_true",
                        help="the 6,000-fit ridge grid as whole processes, start-up included")
    args = parser.parse_args()
    warnings.simplefilter("ignore")
    lines = []
    with tempfile.TemporaryDirectory(prefix="gridplan-bench-") as tmp:
        if args.whole_process:
            print(whole_process(Path(tmp), args.repeats, args.plain_repeats), flush=True)
            return
        for grid in standard_grids(args.quick):
            if args.only and grid.family != args.only:
                continue
            lines.append(bench(grid, Path(tmp), args.repeats, args.plain_repeats))
            print(lines[-1], flush=True)


if __name__ == "__main__":
    main()
