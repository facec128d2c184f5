"""How close the poly-ridge fast path's factorisation phase comes to this machine's BLAS peak.

    python benchmarks/blas_fraction.py [--quick] [--repeats 3]

Peak: the best FLOP rate of a float64 matrix product (4000 x 4000 @ 4000 x 4000,
2 n^3 FLOPs) on one thread. Factorisation phase: every QR and SVD call the fast
path makes on the standard ridge grid of benchmarks/vs_plain_loop.py, timed
call by call on one thread, with the textbook FLOP counts (Golub & Van Loan,
Matrix Computations, 4th ed., sec. 5.2 and Fig. 8.6.1):
  Householder QR, R only, m x n: 2 n^2 (m - n/3) for m >= n, 2 m^2 (n - m/3) otherwise;
  thin SVD with U1, S, V of m x n (m >= n): 14 m n^2 + 8 n^3 (transpose when m < n).
The BLAS library and its kernel are printed (threadpoolctl), because some
machines set OPENBLAS_CORETYPE to pick an older kernel.
"""

from __future__ import annotations

import argparse
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_info, threadpool_limits


def matmul_peak(n: int, repeats: int) -> float:
    """Best GFLOP/s of an n x n float64 matrix product on the current thread limit."""
    rng = np.random.default_rng(0)
    A, B = rng.standard_normal((n, n)), rng.standard_normal((n, n))
    best = min(_seconds(lambda: A @ B) for _ in range(repeats))
    return 2.0 * n ** 3 / best / 1e9


def _seconds(fn) -> float:
    started = time.perf_counter()
    fn()
    return time.perf_counter() - started


def qr_flops(m: int, n: int) -> float:
    """Householder QR, R only."""
    return 2.0 * n * n * (m - n / 3.0) if m >= n else 2.0 * m * m * (n - m / 3.0)


def svd_flops(m: int, n: int) -> float:
    """Thin SVD with U1, S and V."""
    if m < n:
        m, n = n, m
    return 14.0 * m * n * n + 8.0 * n ** 3


class FactorisationClock:
    """Wraps SciPy's qr and numpy's svd (the fast path's two factorisations) to add up their time and textbook FLOPs."""

    def __init__(self):
        import scipy.linalg

        self.seconds, self.flops, self.calls = 0.0, 0.0, 0
        self._linalg = scipy.linalg
        self._qr, self._svd = scipy.linalg.qr, np.linalg.svd

    def __enter__(self) -> "FactorisationClock":
        def qr(a, *args, **kwargs):
            started = time.perf_counter()
            out = self._qr(a, *args, **kwargs)
            self._add(time.perf_counter() - started, qr_flops(*a.shape))
            return out

        def svd(a, *args, **kwargs):
            started = time.perf_counter()
            out = self._svd(a, *args, **kwargs)
            self._add(time.perf_counter() - started, svd_flops(*a.shape))
            return out

        self._linalg.qr, np.linalg.svd = qr, svd
        return self

    def __exit__(self, *exc: object) -> None:
        self._linalg.qr, np.linalg.svd = self._qr, self._svd

    def _add(self, seconds: float, flops: float) -> None:
        self.seconds += seconds
        self.flops += flops
        self.calls += 1


def factorisation_rate(quick: bool, repeats: int) -> tuple[float, float, float, float, int]:
    """(GFLOP/s, seconds, GFLOP, whole-task seconds, calls) of the factorisation phase, best repeat."""
    from vs_plain_loop import standard_grids, write_config

    from gridplan.api import check
    from gridplan.measuring.runner import build_tasks, run_task, workload_of

    _, grid = standard_grids(quick)
    with tempfile.TemporaryDirectory(prefix="gridplan-blas-") as tmp:
        spec = check(write_config(Path(tmp), grid))
    tasks, work = build_tasks(spec, set()), workload_of(spec)
    run_task(tasks[0], work)   # first-call imports stay out of the timing
    best = None
    for _ in range(repeats):
        with FactorisationClock() as clock:
            started = time.perf_counter()
            for task in tasks:
                run_task(task, work)
            whole = time.perf_counter() - started
        result = (clock.flops / clock.seconds / 1e9, clock.seconds, clock.flops / 1e9, whole, clock.calls)
        if best is None or result[1] < best[1]:
            best = result
    return best


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="the quick ridge grid and a 2000^3 product")
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args()
    warnings.simplefilter("ignore")
    blas = [f"{i['internal_api']} {i.get('version')} ({i.get('architecture')} kernel)"
            for i in threadpool_info() if i["user_api"] == "blas"]
    print(f"BLAS: {', '.join(blas)}")
    with threadpool_limits(1):
        peak = matmul_peak(2000 if args.quick else 4000, args.repeats)
        rate, seconds, gflop, whole, calls = factorisation_rate(args.quick, args.repeats)
    print(f"peak (float64 matrix product, one thread): {peak:.1f} GFLOP/s")
    print(f"factorisation phase: {calls} QR/SVD calls, {gflop:.2f} GFLOP in {seconds:.3f} s "
          f"= {rate:.1f} GFLOP/s ({seconds / whole:.0%} of the fast path's {whole:.2f} s on one core)")
    print(f"fraction_of_peak={rate / peak:.2f}")


if __name__ == "__main__":
    main()
