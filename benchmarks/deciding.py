"""Time the deciding commands as whole processes against `run` and the plain scikit-learn loop.

    python benchmarks/deciding.py [--quick] [--repeats 3]

Grid: poly-ridge, degrees 1-10 x 12 alphas (1e-6 .. 1e3) x 8 training sizes x
5 folds on 4,000 rows of the smooth three-input task of vs_plain_loop.py
(120 settings, 4,800 fits). Each gridplan command runs in its own process
(`python -m gridplan ...`), as a user would start it:

    run       gridplan run into a fresh folder
    advise    first advise (fits and keeps the curves), then a second one (reads them)
    curves    with no kept curves, then with them
    report    after advise, so the curves are kept

The plain loop is scikit-learn's learning_curve per setting (n_jobs=2) on the
same folds and nested subsets, also as its own process, producing only the raw
training and validation errors. Printed: each time (best of --repeats), the
ratios the deciding side is held to (advise and curves over run, report over
run) and plain loop / (run + first advise + report).
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from vs_plain_loop import Grid, write_config  # noqa: E402

PLAIN_SCRIPT = """
import sys, numpy as np
sys.path.insert(0, {bench!r})
from gridplan.api import check
from vs_plain_loop import Grid, plain_loop
grid = Grid("poly-ridge", {n_rows}, {capacities!r}, {alphas!r}, {sizes})
plain_loop(check({config!r}), grid)
"""


def timed_process(args: list[str], cwd: Path) -> float:
    started = time.perf_counter()
    subprocess.run(args, cwd=cwd, check=True, stdout=subprocess.DEVNULL)
    return time.perf_counter() - started


def gridplan_cmd(*args: str) -> list[str]:
    return [sys.executable, "-m", "gridplan", *args]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="600 rows, 6 x 6 settings, 5 sizes")
    parser.add_argument("--repeats", type=int, default=3, help="runs of each command (best counts)")
    args = parser.parse_args()
    if args.quick:
        grid = Grid("poly-ridge", 600, tuple(range(1, 7)), tuple(np.logspace(-6, 3, 6)), 5)
    else:
        grid = Grid("poly-ridge", 4000, tuple(range(1, 11)), tuple(np.logspace(-6, 3, 12)), 8)
    times: dict[str, list[float]] = {}

    def note(name: str, seconds: float) -> None:
        times.setdefault(name, []).append(seconds)

    with tempfile.TemporaryDirectory(prefix="gridplan-deciding-") as tmp:
        folder = Path(tmp)
        config = write_config(folder, grid)
        config.write_text(config.read_text(encoding="utf-8").replace(
            "[goal]\n", "[goal]\ntarget = 0.1\n"), encoding="utf-8")
        for attempt in range(args.repeats):
            run_dir = folder / f"run-{attempt}"
            note("run", timed_process(gridplan_cmd("run", str(config), "--out", str(run_dir),
                                                   "-q", "--yes", "-j", "2"), folder))
            note("advise (fits curves)", timed_process(gridplan_cmd("advise", str(run_dir)), folder))
            note("advise (kept curves)", timed_process(gridplan_cmd("advise", str(run_dir)), folder))
            note("report", timed_process(gridplan_cmd("report", str(run_dir), "-o",
                                                      str(run_dir / "report.html")), folder))
            note("curves (kept curves)", timed_process(gridplan_cmd("curves", str(run_dir)), folder))
            (run_dir / "curves.json").unlink()
            note("curves (fits curves)", timed_process(gridplan_cmd("curves", str(run_dir)), folder))
        sizes = grid.size_count
        script = PLAIN_SCRIPT.format(bench=str(Path(__file__).resolve().parent), n_rows=grid.n_rows,
                                     capacities=grid.capacities,
                                     alphas=tuple(float(a) for a in grid.alphas), sizes=sizes,
                                     config=str(config))
        note("plain loop", timed_process([sys.executable, "-c", script], folder))
        shutil.rmtree(folder / "outputs", ignore_errors=True)

    best = {name: min(values) for name, values in times.items()}
    print(f"poly-ridge grid: {len(grid.capacities)} degrees x {len(grid.alphas)} alphas x "
          f"{grid.size_count} sizes x {grid.folds} folds, n = {grid.n_rows}; whole processes, "
          f"best of {args.repeats} (plain loop: 1 run)")
    for name, seconds in best.items():
        print(f"  {name:<22} {seconds:6.2f} s")
    run = best["run"]
    decision = run + best["advise (fits curves)"] + best["report"]
    print(f"advise/run={best['advise (fits curves)'] / run:.2f} "
          f"(kept curves {best['advise (kept curves)'] / run:.2f}) "
          f"curves/run={best['curves (fits curves)'] / run:.2f} "
          f"(kept curves {best['curves (kept curves)'] / run:.2f}) "
          f"report/run={best['report'] / run:.2f} "
          f"plain/(run+advise+report)={best['plain loop'] / decision:.1f}")


if __name__ == "__main__":
    main()
