"""Fitted learning curves kept in the run folder, so every deciding command fits them once.

`curves.json` holds the curves of the latest states of a run's cells, each
under a key that hashes the cells themselves (indices, sizes, errors and
status of every fit), the fitting options and the fitting code. A run that adds or changes a
cell changes the key, so stale curves are never read; they simply age out.
Plain JSON (floats written exactly, NaN as NaN), never pickles.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path
from typing import Callable

import numpy as np
import pandas as pd

from gridplan.common.checks import DEFAULT_BOOT
from gridplan.common.files import replaced
from gridplan.deciding.curves import CurveFit, SettingInfo
from gridplan.deciding.floor import SharedFloor
from gridplan.deciding.gridfit import GridCurves, fit_grid
from gridplan.deciding.shapes import DEFAULT_FAMILIES
from gridplan.measuring.store import CURVES_NAME

#: Bumped whenever fitting changes what it returns, so older files are ignored.
FORMAT_VERSION = 3
#: States of the cells kept at once (each model of a run, a backtest's subset beside it).
KEEP_STATES = 12
KEY_COLUMNS = ("model_index", "capacity_index", "regularization_index", "train_size", "repeat", "fold",
               "train_error", "validation_error", "status")


def _fitting_code() -> str:
    """A hash of the modules that compute the curves: new code never reads old curves."""
    from gridplan.deciding import batchfit, calibration, curves, floor, gridfit, shapes
    digest = hashlib.sha256()
    for module in (batchfit, shapes, curves, floor, gridfit, calibration):
        digest.update(Path(module.__file__).read_bytes())
    return digest.hexdigest()


def cells_key(cells: pd.DataFrame, **options) -> str:
    """A hash of the cells a fit depends on, the fitting options and the fitting code."""
    columns = [c for c in KEY_COLUMNS if c in cells.columns]
    frame = cells.loc[:, columns].sort_values([c for c in columns if c in KEY_COLUMNS[:6]],
                                              kind="stable")
    digest = hashlib.sha256()
    digest.update(json.dumps({"version": FORMAT_VERSION, "code": _fitting_code(), **options},
                             sort_keys=True).encode())
    digest.update(pd.util.hash_pandas_object(frame.reset_index(drop=True), index=False)
                  .to_numpy().tobytes())
    return digest.hexdigest()


def cached_curves(run_dir: str | Path | None, cells: pd.DataFrame, *, n_boot: int = DEFAULT_BOOT,
                  seed: int = 0, families: tuple[str, ...] = DEFAULT_FAMILIES,
                  progress: Callable[[str], None] | None = None) -> GridCurves:
    """The run's curves for these cells: read from the run folder, or fitted and kept there."""
    options = {"n_boot": int(n_boot), "seed": int(seed), "families": list(families)}
    key = cells_key(cells, **options)
    path = Path(run_dir) / CURVES_NAME if run_dir is not None else None
    states = _read(path)
    if key in states:
        grid = grid_from_json(states[key])
        grid.from_cache = True
        return grid
    if progress is not None:
        progress("fitting learning curves")
    grid = fit_grid(cells, n_boot=n_boot, seed=seed, families=families)
    if path is not None:
        states.pop(key, None)
        states[key] = grid_to_json(grid)
        _write(path, dict(list(states.items())[-KEEP_STATES:]))
    return grid


def _read(path: Path | None) -> dict:
    if path is None or not path.is_file():
        return {}
    try:
        document = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    if not isinstance(document, dict) or document.get("version") != FORMAT_VERSION:
        return {}
    states = document.get("states")
    return states if isinstance(states, dict) else {}


def _write(path: Path, states: dict) -> None:
    """Write atomically; a read-only run folder just goes without the file."""
    try:
        with replaced(path) as temporary:
            temporary.write_text(json.dumps({"version": FORMAT_VERSION, "states": states}),
                                 encoding="utf-8")
    except OSError:
        pass


# --- to and from plain JSON ---------------------------------------------------------

_ARRAYS = ("theta", "sizes", "validation_mean", "validation_se", "boot_theta")


def fit_to_json(fit: CurveFit) -> dict:
    out = {name: np.asarray(getattr(fit, name)).tolist() for name in _ARRAYS}
    out.update(family=fit.family, scale=fit.scale, n_units=fit.n_units, inflation=fit.inflation,
               holdout_errors=fit.holdout_errors, asymptote_min=fit.asymptote_min,
               n_repeats=fit.n_repeats, drop_lean=fit.drop_lean,
               drop_spread=fit.drop_spread, level_spread=fit.level_spread,
               own_check_error=fit.own_check_error,
               train_mean=None if fit.train_mean is None else np.asarray(fit.train_mean).tolist(),
               setting=None if fit.setting is None else vars(fit.setting))
    return out


def fit_from_json(data: dict) -> CurveFit:
    arrays = {name: np.array(data[name], dtype=float) for name in _ARRAYS}
    arrays["boot_theta"] = arrays["boot_theta"].reshape(-1, len(arrays["theta"]))
    return CurveFit(
        family=data["family"], scale=float(data["scale"]), n_units=int(data["n_units"]),
        inflation=float(data["inflation"]), holdout_errors=dict(data["holdout_errors"]),
        asymptote_min=float(data["asymptote_min"]), n_repeats=int(data["n_repeats"]),
        drop_lean=float(data["drop_lean"]), drop_spread=float(data["drop_spread"]),
        level_spread=float(data["level_spread"]), own_check_error=data.get("own_check_error"),
        train_mean=None if data["train_mean"] is None else np.array(data["train_mean"], dtype=float),
        setting=None if data["setting"] is None else SettingInfo(**data["setting"]), **arrays)


def grid_to_json(grid: GridCurves) -> dict:
    return {"fits": [[list(key), fit_to_json(fit)] for key, fit in grid.items()],
            "unfitted": grid.unfitted,
            "floor": None if grid.floor is None else vars(grid.floor),
            "calibration": None if grid.calibration is None else grid.calibration.as_dict()}


def grid_from_json(data: dict) -> GridCurves:
    grid = GridCurves({tuple(key): fit_from_json(fit) for key, fit in data["fits"]},
                      unfitted=data["unfitted"])
    grid.floor = None if data["floor"] is None else SharedFloor(**data["floor"])
    if data.get("calibration") is not None:
        from gridplan.deciding.calibration import Calibration
        grid.calibration = Calibration(**data["calibration"])
    return grid


def run_curves(run_dir, *, n_boot: int = DEFAULT_BOOT, seed: int = 0, model=None) -> GridCurves:
    """The curves of a run's model (a folder or a Run), kept in its folder when it has one."""
    from gridplan.common.errors import GridplanError
    from gridplan.measuring.runs import open_run
    run = open_run(run_dir, model=model)
    cells = run.cells()
    if cells.empty:
        raise GridplanError(f"{run.run_dir or 'the grid'} holds no finished fits yet; run the "
                            f"grid first.")
    return cached_curves(run.run_dir, cells, n_boot=n_boot, seed=seed)
