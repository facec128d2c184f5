"""What one report shows, gathered once: the run, its curves, the advice and a stored backtest."""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd

from gridplan.common.checks import DEFAULT_BOOT, check_confidence, check_target
from gridplan.common.errors import GridplanError

if TYPE_CHECKING:  # pragma: no cover - typing only
    from gridplan.deciding.gridfit import GridCurves
    from gridplan.measuring.runs import Run

BACKTEST_FILE = "backtest.json"



# --- what the report is built from ---------------------------------------------------------------------

@dataclass
class ReportInputs:
    """Everything one report shows, gathered once."""

    run: "Run"
    cells: pd.DataFrame
    fits: "GridCurves"
    summary: dict
    target: float | None
    confidence: float
    advice: dict | None
    advice_note: str | None
    backtest: dict | None
    backtest_note: str | None
    n_boot: int
    seed: int
    written: datetime = field(default_factory=lambda: datetime.now(timezone.utc))


def read_backtest(run_dir: str | Path) -> tuple[dict | None, str | None]:
    """The backtest stored in RUN_DIR/backtest.json: (result, None), (None, why unusable) or (None, None)."""
    if run_dir is None:            # a grid kept in memory has no stored backtest
        return None, None
    path = Path(run_dir) / BACKTEST_FILE
    if not path.is_file():
        return None, None
    try:
        result = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        return None, f"{BACKTEST_FILE} could not be read ({exc.__class__.__name__}), so it is not shown."
    if not _looks_like_backtest(result):
        return None, (f"{BACKTEST_FILE} does not hold a backtest result (a list of rows with "
                      f"predicted, low, high and measured errors), so it is not shown.")
    return result, None


def _looks_like_backtest(result: Any) -> bool:
    """True when `result` has the fields the report shows, with numbers where numbers belong."""
    def number(value: Any, optional: bool = False) -> bool:
        return (optional and value is None) or (
            isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value))

    if not isinstance(result, dict):
        return False
    rows = result.get("rows")
    if not isinstance(rows, list) or not rows:
        return False
    for row in rows:
        if not isinstance(row, dict) or not all(number(row.get(k)) for k in
                                                ("predicted", "low", "high", "measured")):
            return False
        if not number(row.get("rel_error"), optional=True):
            return False
    sizes = result.get("fitted_sizes", [])
    return (all(number(result.get(k), optional=True) for k in
                ("median_abs_rel_error", "coverage", "confidence", "full_size"))
            and isinstance(sizes, list) and all(number(v) for v in sizes))


def gather_inputs(run_dir: str | Path, *, target: float | None = None,
                  confidence: float | None = None, at: str | None = None,
                  n_boot: int = DEFAULT_BOOT, seed: int = 0, model: str | None = None) -> ReportInputs:
    """Open the run, fit its curves once, and ask the advisor (when a target is known).

    With several models the pictures and tables show the operating point's
    model (`model`, or the one the advisor stands at).
    """
    from gridplan.deciding.advisor import advise, parse_operating_point
    from gridplan.deciding.curvestore import run_curves
    from gridplan.deciding.gridfit import curves_summary
    from gridplan.measuring import runs

    run = runs.open_run(run_dir, model=model)
    several = len(run.model_names) > 1
    cells = run.cells()
    if cells.empty or not (cells["status"] == "ok").any():
        raise GridplanError(f"{run_dir} holds no finished fits yet; run the grid before writing a report.")
    if at is not None:
        parse_operating_point(at, run.axis_labels("capacity"), run.axis_labels("regularization"))
    config = run.config
    if target is None and config is not None:
        target = config.target_error
    target = None if target is None else check_target(target)
    confidence = check_confidence(confidence if confidence is not None else
                                   (config.confidence if config is not None else 0.9))
    advice, note = None, None

    def ask(curves=None) -> None:
        nonlocal advice, note
        try:
            advice = advise(run_dir, target=target, confidence=confidence, at=at, model=model,
                            n_boot=n_boot, seed=seed, curves=curves)
        except GridplanError as problem:
            if at is not None:
                raise
            note = f"the advisor could not plan for this run: {problem}"

    if target is None:
        note = ("no target error is set (neither [goal] target in the config nor a target option), "
                "so there is no verdict against a target and no plan.")
    elif several:
        ask()
        if advice is not None:
            run = runs.open_run(run_dir, model=advice["operating_point"]["model"])
            cells = run.cells()
    fits = run_curves(run_dir, n_boot=n_boot, seed=seed, model=run.model)
    summary = curves_summary(fits, target=target, confidence=confidence)
    if target is not None and not several:
        ask(fits)
    backtest, backtest_note = read_backtest(run.run_dir)
    return ReportInputs(run=run, cells=cells, fits=fits, summary=summary, target=target,
                        confidence=confidence, advice=advice, advice_note=note,
                        backtest=backtest, backtest_note=backtest_note, n_boot=n_boot, seed=seed)
