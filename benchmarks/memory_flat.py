"""Peak memory of a gridplan run as the grid grows: it should stay flat, since rows stream to the store.

    python benchmarks/memory_flat.py

Runs the poly-ridge grid of benchmarks/vs_plain_loop.py (n = 2000, 3 inputs,
degrees 1-10) at growing sizes, each in a fresh process with jobs=1 so that
every fit happens in the measured process, and prints the peak resident set
size (resource.getrusage ru_maxrss) next to the number of fits.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent

CHILD = """
import resource, sqlite3, sys, warnings
warnings.simplefilter("ignore")
from gridplan import api
run_dir = api.run(sys.argv[1], out=sys.argv[2], jobs=1)
peak_kib = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss   # before anything reads the store back
rows = sqlite3.connect(run_dir / "store.sqlite").execute("SELECT COUNT(*) FROM folds").fetchone()[0]
print(rows, peak_kib)
"""

# (alphas, sizes, folds, repeats): from 4,800 to 96,000 fits
GROWTH = ((12, 8, 5, 1), (24, 16, 5, 2), (48, 16, 10, 2))


def measure(folder: Path, alphas: int, sizes: int, folds: int, repeats: int) -> tuple[int, int]:
    """(fits, peak RSS in MiB) of one run in a fresh process."""
    from vs_plain_loop import Grid, write_config

    grid = Grid("poly-ridge", 2000, tuple(range(1, 11)), tuple(np.logspace(-6, 3, alphas)), sizes, folds)
    config = write_config(folder, grid)
    text = config.read_text().replace("repeats = 1", f"repeats = {repeats}")
    config.write_text(text)
    out = folder / f"run-{alphas}-{sizes}-{folds}-{repeats}"
    result = subprocess.run([sys.executable, "-c", CHILD, str(config), str(out)],
                            capture_output=True, text=True, check=True)
    rows, kib = result.stdout.split()
    return int(rows), int(kib) // 1024


def main() -> None:
    argparse.ArgumentParser(description=__doc__.splitlines()[0]).parse_args()
    sys.path.insert(0, str(HERE))
    with tempfile.TemporaryDirectory(prefix="gridplan-memory-") as tmp:
        for alphas, sizes, folds, repeats in GROWTH:
            fits, mib = measure(Path(tmp), alphas, sizes, folds, repeats)
            print(f"{alphas} alphas x {sizes} sizes x {folds} folds x {repeats} repeats: "
                  f"{fits} fits, peak RSS {mib} MiB", flush=True)


if __name__ == "__main__":
    main()
