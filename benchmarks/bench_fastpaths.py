"""Time the exact fast paths against the plain per-cell fits, on one core.

    python benchmarks/bench_fastpaths.py [--repeats 3]

poly-ridge: 3 inputs, 1600 training and 400 validation rows, degrees 1-10,
12 alphas (1e-6 .. 1e3), mse. tree: same rows, depths 1-14, min_samples_leaf=5.
Prints the best of `repeats` wall-clock times, the speed-up, the largest
relative difference from the plain fits and how many cells fell back.
"""

from __future__ import annotations

import argparse
import time
import warnings

import numpy as np
from threadpoolctl import threadpool_limits

from gridplan.fastpaths import _plain_poly_ridge, poly_ridge_grid, tree_depth_grid
from gridplan.metrics import error_of


def best_time(fn, repeats: int):
    times, result = [], None
    for _ in range(repeats):
        start = time.perf_counter()
        result = fn()
        times.append(time.perf_counter() - start)
    return min(times), result


def rel(a: float, b: float) -> float:
    return abs(a - b) / abs(b) if b else abs(a)


def data(inputs: str, seed: int = 0, n_train: int = 1600, n_val: int = 400):
    rng = np.random.default_rng(seed)
    n = n_train + n_val
    X = rng.uniform(-1, 1, size=(n, 3)) if inputs == "uniform" else rng.normal(size=(n, 3))
    y = np.sin(3 * X[:, 0]) + X[:, 1] ** 2 - X[:, 0] * X[:, 2] + 0.3 * rng.normal(size=n)
    return X[:n_train], y[:n_train], X[n_train:], y[n_train:]


def bench_poly_ridge(inputs: str, repeats: int) -> None:
    X_train, y_train, X_val, y_val = data(inputs)
    degrees, alphas = list(range(1, 11)), list(np.logspace(-6, 3, 12))

    def fast():
        return poly_ridge_grid(X_train, y_train, X_val, y_val, degrees, alphas, task="regression", metric="mse")

    def plain():
        return [[_plain_poly_ridge(X_train, y_train, X_val, y_val, d, a, "regression", "mse", None)
                 for a in alphas] for d in degrees]

    t_fast, grid = best_time(fast, repeats)
    t_plain, ref = best_time(plain, repeats)
    worst = max(max(rel(c.train_error, r[0]), rel(c.validation_error, r[1]))
                for row, ref_row in zip(grid, ref) for c, r in zip(row, ref_row))
    fallbacks = sum(c.path == "plain-fallback" for row in grid for c in row)
    print(f"poly-ridge ({inputs} inputs): fast {t_fast:.3f} s, plain {t_plain:.3f} s, "
          f"speed-up {t_plain / t_fast:.1f}x, max rel diff {worst:.1e}, "
          f"fallback cells {fallbacks}/{len(degrees) * len(alphas)}")


def bench_tree(repeats: int) -> None:
    from sklearn.tree import DecisionTreeRegressor

    X_train, y_train, X_val, y_val = data("normal")
    depths = list(range(1, 15))

    def fast():
        return tree_depth_grid(X_train, y_train, X_val, y_val, depths, task="regression", metric="mse",
                               tree_params={"min_samples_leaf": 5})

    def plain():
        out = []
        for d in depths:
            m = DecisionTreeRegressor(max_depth=d, random_state=0, min_samples_leaf=5).fit(X_train, y_train)
            out.append((error_of("mse", y_train, m.predict(X_train)), error_of("mse", y_val, m.predict(X_val))))
        return out

    t_fast, cells = best_time(fast, repeats)
    t_plain, ref = best_time(plain, repeats)
    worst_train = max(rel(c.train_error, r[0]) for c, r in zip(cells, ref))
    worst_val = max(rel(c.validation_error, r[1]) for c, r in zip(cells, ref))
    print(f"tree (3 normal inputs, depths 1-14): fast {t_fast:.3f} s, plain {t_plain:.3f} s, "
          f"speed-up {t_plain / t_fast:.1f}x, max rel diff train {worst_train:.1e}, validation {worst_val:.1e}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    warnings.simplefilter("ignore")
    with threadpool_limits(1):
        for inputs in ("uniform", "normal"):
            bench_poly_ridge(inputs, args.repeats)
        bench_tree(args.repeats)


if __name__ == "__main__":
    main()
