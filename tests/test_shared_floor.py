"""The shared noise floor: every setting's asymptote is the floor plus its own bias."""

from __future__ import annotations

import numpy as np
import pandas as pd

from gridplan.deciding.diagnosis import estimate_noise_floor
from gridplan.deciding.floor import _same_level
from gridplan.deciding.gridfit import fit_grid

SIZES = [25, 50, 100, 200, 400, 800, 1600]
SIGMA2 = 0.25


def _cells(rng) -> pd.DataFrame:
    # Standard result: with N(0, sigma^2) label noise the best reachable MSE
    # is sigma^2. Settings 0 and 3 (two capacities) have nearly converged to
    # it, their training error close below (the curves have met); setting 1
    # (a flexible model) is still falling steeply, so its own asymptote is
    # barely identified; setting 2 is biased (floor + 0.1).
    truths = {0: (SIGMA2, 2.0, 0.9, 0.95), 1: (SIGMA2, 40.0, 0.55, 0.6),
              2: (SIGMA2 + 0.1, 1.0, 0.7, 0.95), 3: (SIGMA2, 1.0, 0.9, 0.9)}
    rows = []
    for cap, (a, b, c, train) in truths.items():
        for m in SIZES:
            for fold in range(5):
                error = (a + b * m ** -c) * (1 + 0.04 * rng.standard_normal())
                rows.append({"capacity_index": cap, "regularization_index": 0,
                             "capacity": str(cap), "regularization": "none", "train_size": m,
                             "repeat": 0, "fold": fold, "train_error": train * a,
                             "validation_error": error, "status": "ok"})
    return pd.DataFrame(rows)


def test_steep_curves_cannot_extrapolate_below_the_shared_floor():
    hits, refits, found = 0, 0, 0
    truth_at_6400 = SIGMA2 + 40.0 * 6400 ** -0.55   # the steep setting's known curve
    for seed in range(8):      # the floor is claimed only when two capacities agree: not every draw
        cells = _cells(np.random.default_rng(seed))
        free = fit_grid(cells, n_boot=40, seed=seed, share_floor=False)
        shared = fit_grid(cells, n_boot=40, seed=seed)
        floor = shared.floor
        if floor is None:
            # the two converged capacities do not level off at one well-determined height
            one, two = ((free[k].asymptote, *free[k].asymptote_band(0.9)) for k in ((0, 0), (3, 0)))
            assert not _same_level(one, two)
            continue
        found += 1
        assert floor.low <= floor.value <= floor.high
        hits += floor.low <= SIGMA2 <= floor.high
        # the floor never exceeds what was measured (up to noise)
        best_measured = cells[cells.train_size == 1600].groupby("capacity_index").validation_error.mean().min()
        assert floor.high <= best_measured + 0.05
        for key, fit in shared.items():
            assert fit.asymptote >= floor.low - 1e-12
        # the steep setting was refitted: its forecast at 4x the data is no
        # longer below the floor band
        steep = shared[(1, 0)]
        if free[(1, 0)].asymptote < floor.low:
            refits += 1
            assert steep.asymptote_min == floor.low
            # bounding the asymptote moves the forecast towards the truth
            assert abs(steep.predict(6400) - truth_at_6400) < abs(free[(1, 0)].predict(6400) - truth_at_6400)
        assert steep.predict(6400) >= floor.low - 1e-12
        # settings already above the floor are left as they were
        assert shared[(2, 0)].asymptote == free[(2, 0)].asymptote
        assert estimate_noise_floor(shared, 0.9).value == floor.value
    assert found >= 3
    assert hits >= 3          # the 90% floor band holds sigma^2 in most draws
    assert refits >= 1
