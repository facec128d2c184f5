"""Curves of a whole grid: every setting fitted together from the cells, then summarised."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Iterable, Mapping

import numpy as np
import pandas as pd

from gridplan.common.checks import DEFAULT_BOOT, check_boot, check_confidence
from gridplan.common.errors import GridplanError
from gridplan.common.jsonable import plain as _plain
from gridplan.common.results import CurvesSummary
from gridplan.deciding.calibration import CHECK_BOOT, check_problems
from gridplan.deciding.calibration import calibrate as calibrate_fits
from gridplan.deciding.curves import (
    CHECKED_HORIZON,
    DEFAULT_MAX_SIZE,
    WIDE_BAND_RATIO,
    CurveFit,
    SettingInfo,
    check_families,
    fit_problems,
    make_problem,
)
from gridplan.deciding.floor import SharedFloor, shared_floor
from gridplan.deciding.shapes import DEFAULT_FAMILIES, FAMILIES

# --- a whole grid ----------------------------------------------------------------

CELL_COLUMNS = ("capacity_index", "regularization_index", "capacity", "regularization",
                "train_size", "repeat", "fold", "train_error", "validation_error", "status")




class GridCurves(dict):
    """Fitted curves keyed by (capacity_index, regularization_index).

    `unfitted` lists the settings that could not be fitted, each with a reason;
    `floor` is the shared noise floor (None when no setting determines it).
    """

    def __init__(self, *args, unfitted: list[dict] | None = None, **kwargs):
        super().__init__(*args, **kwargs)
        self.unfitted: list[dict] = list(unfitted or [])
        self.floor: SharedFloor | None = None
        self.from_cache = False     # read back from the run folder (gridplan.deciding.curvestore)
        self.calibration = None     # gridplan.deciding.calibration.Calibration, when calibrated


@dataclass(frozen=True)
class _SettingData:
    """One setting's usable measurements as (size x unit) matrices."""

    info: SettingInfo
    sizes: np.ndarray
    validation: np.ndarray
    training: np.ndarray
    n_repeats: int
    seed: np.random.SeedSequence


def _settings_data(cells: pd.DataFrame, seed: int) -> list[_SettingData]:
    """Every setting's matrices, built from the cells table in one pass."""
    keys = cells[["capacity_index", "regularization_index"]].to_numpy(dtype=np.int64)
    settings, setting_of = np.unique(keys, axis=0, return_inverse=True)
    setting_of = setting_of.reshape(-1)
    ok = (cells["status"] == "ok").to_numpy()
    sizes, size_of = np.unique(cells["train_size"].to_numpy(dtype=float), return_inverse=True)
    unit_pairs = cells[["repeat", "fold"]].to_numpy(dtype=np.int64)
    units, unit_of = np.unique(unit_pairs, axis=0, return_inverse=True)
    unit_of = unit_of.reshape(-1)
    shape = (len(settings), len(sizes), len(units))
    validation, training = np.full(shape, np.nan), np.full(shape, np.nan)
    picked = (setting_of[ok], size_of.reshape(-1)[ok], unit_of[ok])
    validation[picked] = cells["validation_error"].to_numpy(dtype=float)[ok]
    training[picked] = cells["train_error"].to_numpy(dtype=float)[ok]
    measured = np.zeros(shape, dtype=bool)
    measured[picked] = True
    first = pd.Series(np.arange(len(cells))).groupby(setting_of).first().to_numpy()
    skipped = np.bincount(setting_of[~ok], minlength=len(settings))
    capacity = cells["capacity"].to_numpy()
    regularization = cells["regularization"].to_numpy()
    out = []
    for s, (cap, reg) in enumerate(settings):
        info = SettingInfo(int(cap), int(reg), str(capacity[first[s]]),
                           str(regularization[first[s]]), int(skipped[s]))
        rows = measured[s].any(axis=1)
        cols = measured[s].any(axis=0)
        out.append(_SettingData(
            info, sizes[rows], validation[s][np.ix_(rows, cols)],
            training[s][np.ix_(rows, cols)], len(np.unique(units[cols, 0])),
            np.random.SeedSequence([int(seed), int(cap), int(reg)])))
    return out


def _unfitted(info: SettingInfo, reason: str) -> dict:
    return {"capacity_index": info.capacity_index,
            "regularization_index": info.regularization_index,
            "capacity": info.capacity, "regularization": info.regularization,
            "skipped_rows": info.skipped_rows, "reason": reason}


def _key(data: _SettingData) -> tuple[int, int]:
    return data.info.capacity_index, data.info.regularization_index


def _fit_settings(settings: list[_SettingData], families: tuple[str, ...], n_boot: int,
                  asymptote_min: float = 0.0, jobs: int | None = 1, checks: bool = False,
                  ) -> tuple[list[CurveFit | dict], list[list]]:
    """Fit the given settings together; a dict describes each one that could not be fitted.

    With `checks`, each setting's refits on its smaller sizes (the run's own
    extrapolation record, `calibration.check_problems`) go into the same
    batches; they come back as one list of (refit, held sizes) per setting.
    """
    results: list[CurveFit | dict | None] = [None] * len(settings)
    problems, where = [], []
    for i, data in enumerate(settings):
        try:
            if data.sizes.size == 0:
                raise GridplanError("no rows with status 'ok'")
            problems.append(make_problem(data.sizes, data.validation, data.training, data.info,
                                     data.n_repeats, data.seed, asymptote_min))
            where.append(i)
        except GridplanError as problem:
            results[i] = _unfitted(data.info, str(problem))
    boots = [n_boot] * len(problems)
    held = []
    if checks:
        for i, data in enumerate(settings):
            for problem, sizes in check_problems(data, asymptote_min):
                problems.append(problem)
                held.append((i, sizes))
        boots += [CHECK_BOOT] * len(held)
    fitted = fit_problems(problems, families, boots, jobs)
    for i, result in zip(where, fitted):
        results[i] = _unfitted(settings[i].info, result) if isinstance(result, str) else result
    refits: list[list] = [[] for _ in settings]
    for (i, sizes), refit in zip(held, fitted[len(where):]):
        refits[i].append((refit, sizes))
    return results, refits


def fit_grid(cells: pd.DataFrame, *, families: Iterable[str] = DEFAULT_FAMILIES,
             n_boot: int = DEFAULT_BOOT, seed: int = 0, share_floor: bool = True,
             calibrate: bool = True, jobs: int | None = None) -> GridCurves:
    """Fit a learning curve for every (capacity, regularisation) setting of a grid.

    Only rows with status "ok" are used; the others are counted per setting.
    Each setting's bootstrap is seeded from (seed, capacity_index,
    regularization_index), so results do not depend on order. All settings
    are fitted together (`gridplan.deciding.batchfit`). With `share_floor`, the noise
    floor is estimated from the well-determined settings (`shared_floor`) and
    every setting whose asymptote fell below the floor's lower band edge is
    refitted with its asymptote bounded there. With `calibrate`, every
    forecast beyond the data carries this run's own extrapolation record
    (`gridplan.deciding.calibration`), kept in `GridCurves.calibration`.
    `jobs` cores fit side by side (None: all of this machine's; the results
    do not depend on it).
    """
    missing = [c for c in CELL_COLUMNS if c not in cells.columns]
    if missing:
        raise GridplanError(f"The cells table lacks the column(s): {', '.join(missing)}.")
    if cells.empty:
        raise GridplanError("The cells table is empty, so there are no learning curves to fit.")
    families = check_families(families)
    check_boot(n_boot)
    settings = _settings_data(cells, seed)
    grid = GridCurves()
    results, refits = _fit_settings(settings, families, n_boot, jobs=jobs, checks=calibrate)
    for data, result in zip(settings, results):
        if isinstance(result, CurveFit):
            grid[_key(data)] = result
        else:
            grid.unfitted.append(result)
    grid.floor = shared_floor(grid) if grid else None
    if share_floor and grid.floor is not None:
        bound = grid.floor.low
        again = [i for i, data in enumerate(settings)
                 if _key(data) in grid and grid[_key(data)].asymptote < bound]
        results, again_refits = _fit_settings([settings[i] for i in again], families, n_boot,
                                              bound, jobs, calibrate)
        for i, result, setting_refits in zip(again, results, again_refits):
            if isinstance(result, CurveFit):
                grid[_key(settings[i])] = result
                refits[i] = setting_refits
    if calibrate and grid:
        grid.calibration = calibrate_fits(
            grid, {_key(data): refits[i] for i, data in enumerate(settings) if _key(data) in grid})
    return grid


# --- summary ----------------------------------------------------------------------

def _setting_summary(fit: CurveFit, target: float | None, confidence: float,
                     current_size: float | None, max_size: float) -> dict:
    info = fit.setting or SettingInfo(-1, -1, "", "")
    largest = float(fit.sizes[-1])
    reference = float(current_size) if current_size else largest
    floor_low, floor_high = fit.asymptote_band(confidence)
    row = {"capacity": info.capacity, "regularization": info.regularization,
           "capacity_index": info.capacity_index,
           "regularization_index": info.regularization_index,
           "family": fit.family, "formula": FAMILIES[fit.family].formula,
           "params": fit.params, "holdout_errors": fit.holdout_errors,
           "asymptote": fit.asymptote, "asymptote_low": floor_low, "asymptote_high": floor_high,
           "largest_size": int(largest), "error_at_largest": float(fit.validation_mean[-1]),
           "reference_size": int(reference), "horizon_size": int(CHECKED_HORIZON * largest),
           "plateau_at_floor": bool(fit.asymptote_min > 0
                                    and fit.asymptote <= fit.asymptote_min * (1 + 1e-9)),
           "own_check_error": fit.own_check_error}
    for factor in (2, 4):
        low, high = fit.band(factor * reference, confidence)
        row[f"predicted_{factor}x"] = float(fit.predict(factor * reference))
        row[f"predicted_{factor}x_low"], row[f"predicted_{factor}x_high"] = float(low), float(high)
    row["band_too_wide"] = fit.band_too_wide(2 * reference, confidence)
    if target is None:
        row.update(samples_needed=None, samples_needed_low=None, samples_needed_high=None,
                   samples_needed_point=None, reachable=None, reason="no target given")
    else:
        need = fit.samples_needed(target, confidence, max_size)
        row.update(samples_needed=need.needed, samples_needed_low=need.low,
                   samples_needed_high=need.high, samples_needed_point=need.point,
                   reachable=need.reachable, reason=need.reason)
    row["midpoint_check"] = fit.midpoint_check(confidence)
    row["skipped_rows"] = info.skipped_rows
    return row


def curves_summary(fits: Mapping[tuple[int, int], CurveFit], *, target: float | None,
                   confidence: float = 0.9, current_size: float | None = None,
                   max_size: float = DEFAULT_MAX_SIZE) -> "CurvesSummary":
    """A typed summary: one entry per setting with floor, forecasts and samples needed.

    Forecasts are at 2x and 4x `current_size` (default: each setting's
    largest measured size).
    """
    check_confidence(confidence)
    settings = [_setting_summary(fits[key], target, confidence, current_size, max_size)
                for key in sorted(fits)]
    calibration = getattr(fits, "calibration", None)
    from gridplan.common.results import CurvesSummary
    return CurvesSummary.from_dict(_plain({
        "target": target, "confidence": confidence, "wide_band_ratio": WIDE_BAND_RATIO,
        "settings": settings, "unfitted": list(getattr(fits, "unfitted", [])),
        "calibration": calibration.as_dict() if calibration is not None else None,
        "metric": None, "model": None}))
