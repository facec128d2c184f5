"""Backtest: forecast the full-size validation error from a fraction of the data.

The grid is run at training sizes up to `fraction` of the full training fold
plus the full size itself. Curves are fitted on the small sizes only, and the
forecast at the full size is compared with what was measured there. This tells
a user how far to trust forecasts on their own data.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np

from gridplan import api
from gridplan.common.checks import DEFAULT_BOOT
from gridplan.common.errors import GridplanError
from gridplan.common.jsonable import plain as _plain
from gridplan.measuring.config import Config
from gridplan.measuring.spec import GridSpec
from gridplan.measuring.splits import size_ladder, smallest_training_fold

MIN_CURVE_SIZES = 3


def backtest_spec(spec: GridSpec, fraction: float) -> GridSpec:
    """The config's grid with a size ladder up to fraction x full, plus the full size."""
    if not 0 < fraction < 1:
        raise GridplanError(f"fraction must lie strictly between 0 and 1, got {fraction:g}.")
    full = smallest_training_fold(list(spec.folds))
    limit = int(np.floor(fraction * full))
    c = spec.config
    smallest = c.smallest_size if c.smallest_size is not None else spec.sizes[0]
    if limit < smallest or limit < MIN_CURVE_SIZES:
        raise GridplanError(f"fraction {fraction:g} leaves {limit} training rows, fewer than the "
                            f"smallest size {smallest}; use a larger fraction.")
    if c.size_values is not None:
        small = tuple(v for v in c.size_values if v <= limit)
    else:
        small = size_ladder(limit, values=None, count=max(c.size_count, MIN_CURVE_SIZES),
                            smallest=smallest)
    if len(small) < MIN_CURVE_SIZES:
        raise GridplanError(f"fraction {fraction:g} leaves only {len(small)} training sizes "
                            f"(need {MIN_CURVE_SIZES}) to fit curves on; use a larger fraction "
                            f"or more sizes.")
    return dataclasses.replace(spec, sizes=tuple(sorted(set(small) | {full})))


def backtest(config: Config, *, fraction: float = 0.25, out: str | Path | None = None,
             jobs: int | None = None, n_boot: int = DEFAULT_BOOT, seed: int = 0,
             progress=None, allow_any_estimator: bool = False):
    """Run the backtest grid (resumably) and compare forecasts with measurements (a results.Backtest)."""
    from gridplan.common.results import Backtest
    from gridplan.deciding.gridfit import fit_grid
    from gridplan.measuring.spec import RunSpec, resolve_run
    whole = resolve_run(config, allow_any_import=allow_any_estimator)
    spec = RunSpec(config, tuple(backtest_spec(m, fraction) for m in whole.models))
    run_dir = Path(out) if out is not None else api.default_run_dir(config).with_name(
        f"{config.name}-backtest")
    api.run(config, out=run_dir, jobs=jobs, spec=spec, progress=progress)
    full = spec.sizes[-1]
    rows, unfitted, calibrations = [], [], {}
    for index, name in enumerate(whole.names):
        cells = api.open_run(run_dir, model=index).cells()
        ok = cells[cells.status == "ok"]
        fits = fit_grid(ok[ok.train_size < full], n_boot=n_boot, seed=seed)
        measured = ok[ok.train_size == full].groupby(
            ["capacity_index", "regularization_index"]).validation_error.mean()
        for key, fit in sorted(fits.items()):
            if key not in measured.index:
                continue
            low, high = fit.band(float(full), config.confidence)
            predicted = float(fit.predict(float(full)))
            truth = float(measured.loc[key])
            rows.append({
                "model": name, "capacity": fit.setting.capacity,
                "regularization": fit.setting.regularization,
                "capacity_index": key[0], "regularization_index": key[1],
                "family": fit.family, "largest_fitted_size": int(fit.sizes[-1]),
                "full_size": int(full), "predicted": predicted, "low": float(low),
                "high": float(high), "measured": truth,
                "abs_error": abs(predicted - truth),
                "rel_error": abs(predicted - truth) / truth if truth > 0 else None,
                "inside_band": bool(low <= truth <= high),
                "own_check_error": fit.own_check_error})
        unfitted += [dict(u, model=name) for u in fits.unfitted]
        calibrations[name] = fits.calibration.as_dict() if fits.calibration is not None else None
    if not rows:
        raise GridplanError("no setting had enough finished fits for a backtest.")
    rel = [r["rel_error"] for r in rows if r["rel_error"] is not None]
    return Backtest.from_dict(_plain({
        "run_dir": str(run_dir), "fraction": fraction, "confidence": config.confidence,
        "metric": config.metric, "fitted_sizes": [int(s) for s in spec.sizes[:-1]],
        "full_size": int(full), "rows": rows,
        "median_abs_rel_error": float(np.median(rel)) if rel else None,
        "coverage": float(np.mean([r["inside_band"] for r in rows])),
        "unfitted": unfitted, "calibration": calibrations[whole.names[0]],
        "models": list(whole.names), "calibrations": calibrations}))
