"""Pictures of a run: grid heatmaps and learning-curve plots, as matplotlib Figures.

Figures read a run through `gridplan.measuring.runs.open_run` (its `cells()` table, axes
and meta) and take curve fits and advice as arguments; no lower layer imports this module.
Figures are built without pyplot, so none lingers in a global list; save them
with `save_figure` (PNG or SVG by extension) or embed them with
`figure_to_png_bytes` / `figure_to_svg_text`.

Colour choices (our own):

- Heatmaps use matplotlib's 'cividis' map: perceptually uniform, its lightness
  rises steadily from dark blue (low error) to pale yellow (high error), so it
  keeps its order in greyscale, and it was built to look the same to readers
  with red-green colour-vision deficiency.
- Curves: validation error in dark rust with round markers, training error in
  teal with square markers (different lightness and marker shape, so the two
  stay apart in greyscale and for colour-blind readers); the noise floor is a
  dark grey dotted line, the target a black dash-dot line.

Only fold rows with status "ok" are drawn; every figure says how many rows it
skipped.
"""

from __future__ import annotations

import math
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterable, Mapping, Sequence

import numpy as np
import pandas as pd

from gridplan.common.errors import GridplanError
from gridplan.common.metrics import metric_label
from gridplan.common.wording import plural

if TYPE_CHECKING:  # pragma: no cover - typing only
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

    from gridplan.deciding.curves import CurveFit
    from gridplan.measuring.runs import Run

SHOWS = ("validation", "train", "gap")
HEATMAP_AXES = ("capacity", "regularization")
FIGURE_FORMATS = ("png", "svg")

#: The forecast is drawn from the largest measured size to this many times it.
FORECAST_FACTOR = 4.0

#: Small multiples draw at most this many panels unless told otherwise.
DEFAULT_MAX_PANELS = 12

#: A heatmap's colour scale is logarithmic when every value is positive and the
#: largest is more than this many times the smallest; otherwise it is linear.
LOG_SCALE_RATIO = 10.0

#: A curve panel's y axis stops at this many times the larger of the validation
#: error at the largest measured size and the target, so a few huge errors at
#: tiny sizes do not flatten the part of the curve that matters.
CURVE_TOP_FACTOR = 3.0

CUT_OFF_NOTE = "values above the top edge at small sizes are cut off"

HEATMAP_COLORMAP = "cividis"
VALIDATION_COLOUR = "#a63d1c"
TRAINING_COLOUR = "#2f9683"
FLOOR_COLOUR = "#4a4a4a"
TARGET_COLOUR = "#000000"
PLAN_COLOUR = "#ff7f3f"
BEYOND_GRID_COLOUR = "#d9d9d9"
PNG_DPI = 150

SHOW_TITLES = {
    "validation": "Validation error",
    "train": "Training error",
    "gap": "Gap (validation minus training error)",
}


# --- matplotlib set-up --------------------------------------------------------------

def _use_agg() -> None:
    """matplotlib on the non-interactive Agg canvas, unless pyplot already chose one."""
    import matplotlib
    if "matplotlib.pyplot" not in sys.modules:
        matplotlib.use("Agg")


def load_drawing_libraries() -> None:
    """Import matplotlib (on the Agg canvas) and seaborn now, before any figure is drawn."""
    _use_agg()
    import matplotlib.backends.backend_agg  # noqa: F401
    import seaborn  # noqa: F401


def _new_figure(width: float, height: float) -> "Figure":
    """A Figure on the non-interactive Agg canvas, not registered with pyplot."""
    _use_agg()
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    figure = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(figure)
    return figure


def _stroke(width: float = 3.0, colour: str = "black") -> list:
    """A dark halo so white or coloured marks stay visible on any cell colour."""
    from matplotlib import patheffects
    return [patheffects.withStroke(linewidth=width, foreground=colour)]


# --- reading a run --------------------------------------------------------------------

def _sizes(run: "Run") -> list[int]:
    """Training sizes of the grid, ascending."""
    entries = run.axes.get("size")
    if entries:
        return [int(e[1]) if isinstance(e, (list, tuple)) else int(e) for e in entries]
    return [int(s) for s in run.meta.get("sizes", [])]


def _metric_name(run: "Run") -> str:
    metric = run.meta.get("metric", "")
    return metric_label(metric)


def _axis_title(run: "Run", axis: str) -> str:
    param = run.meta.get(f"{axis}_param")
    word = "capacity" if axis == "capacity" else "regularisation"
    if param == "features":
        return f"{word} (feature set)"
    return f"{word} ({param})" if param else word


def _short_param(run: "Run", axis: str) -> str:
    """The parameter name for in-cell and panel text, or a plain word when it is long."""
    param = run.meta.get(f"{axis}_param")
    if not param:
        return "reg" if axis == "regularization" else "cap"
    return param if len(param) <= 9 else ("reg" if axis == "regularization" else "cap")


def _target_default(run: "Run", target: float | None) -> float | None:
    if target is not None:
        return float(target)
    config = getattr(run, "config", None)
    value = getattr(config, "target_error", None) if config is not None else None
    return float(value) if value is not None else None


def _confidence_default(run: "Run", confidence: float | None) -> float:
    if confidence is not None:
        value = confidence
    else:
        config = getattr(run, "config", None)
        value = float(getattr(config, "confidence", 0.9) or 0.9) if config is not None else 0.9
    from gridplan.common.checks import check_confidence
    return check_confidence(value)


def _usable_cells(run: "Run") -> tuple[pd.DataFrame, int]:
    """The rows with status "ok" and how many rows were skipped."""
    cells = run.cells()
    ok = cells[cells["status"] == "ok"].copy()
    if ok.empty:
        raise GridplanError(f"{run.run_dir} holds no successful fits to draw.")
    ok["gap"] = ok["validation_error"] - ok["train_error"]
    return ok, int(len(cells) - len(ok))


def _resolve_capacity(run: "Run", capacity: str | int | None, means: pd.DataFrame) -> int:
    """Index of a capacity given by its label; None picks the lowest error at the largest size."""
    labels = run.axis_labels("capacity")
    if capacity is None:
        largest = means["size_index"].max()
        at_largest = means[means["size_index"] == largest]
        return int(at_largest.loc[at_largest["validation"].idxmin(), "capacity_index"])
    wanted = str(capacity)
    if wanted not in labels:
        raise GridplanError(f"Capacity {wanted!r} is not in this grid; choose one of "
                            f"{', '.join(labels)}.")
    return labels.index(wanted)


def _resolve_setting(run: "Run", setting: Sequence[Any]) -> tuple[int, int]:
    """(capacity, regularisation) given as two indices (ints) or two labels (strings)."""
    if not isinstance(setting, (list, tuple)) or len(setting) != 2:
        raise GridplanError("A setting is a pair (capacity, regularisation) of labels or indices.")
    resolved = []
    for value, axis in zip(setting, HEATMAP_AXES):
        labels = run.axis_labels(axis)
        if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
            if not 0 <= int(value) < len(labels):
                raise GridplanError(f"The {axis} index {int(value)} is outside the grid "
                                    f"(0 to {len(labels) - 1}).")
            resolved.append(int(value))
        elif str(value) in labels:
            resolved.append(labels.index(str(value)))
        else:
            raise GridplanError(f"{axis.capitalize()} {str(value)!r} is not in this grid; "
                                f"choose one of {', '.join(labels)}.")
    return resolved[0], resolved[1]


# --- heatmap data -------------------------------------------------------------------

@dataclass
class HeatmapData:
    """The numbers behind a heatmap: rows follow the chosen axis (least to most), columns the sizes."""

    show: str
    axis: str
    values: np.ndarray                 # the shown quantity, mean over usable folds
    validation: np.ndarray             # validation error of the same cells (for the target)
    annotations: np.ndarray            # the text written in each cell
    row_labels: list[str]
    sizes: list[int]
    regularization_index: np.ndarray   # the regularisation each cell uses (-1: no results)
    fold_counts: np.ndarray            # usable (repeat, fold) rows per cell
    capacity_index: int | None         # the fixed capacity of a regularisation heatmap
    skipped_rows: int


def _cell_means(ok: pd.DataFrame) -> pd.DataFrame:
    keys = ["capacity_index", "regularization_index", "size_index"]
    return ok.groupby(keys).agg(train=("train_error", "mean"),
                                validation=("validation_error", "mean"),
                                gap=("gap", "mean"),
                                folds=("validation_error", "count")).reset_index()


def _value_text(value: float) -> str:
    return f"{value:.3g}"


def _compact_labels(labels: list[str]) -> list[str]:
    """Numeric labels to three significant figures, so they fit in a cell, where that keeps
    them apart; otherwise the labels as they are."""
    try:
        compact = [f"{float(label):.3g}" for label in labels]
    except ValueError:
        return list(labels)
    return compact if len(set(compact)) == len(set(labels)) else list(labels)


def heatmap_data(run: "Run", show: str = "validation", axis: str = "capacity",
                 capacity: str | int | None = None) -> HeatmapData:
    """Mean errors on a (capacity or regularisation) x training-size grid.

    axis="capacity": each cell uses the regularisation with the lowest mean
    validation error for that capacity and size (the lowest index on ties),
    whatever `show` is, and its label is written under the value.
    axis="regularization": the cells of one capacity (given by label; by
    default the capacity with the lowest validation error at the largest size).
    """
    if show not in SHOWS:
        raise GridplanError(f"Unknown show value {show!r}; choose one of {', '.join(SHOWS)}.")
    axis = "regularization" if axis == "regularisation" else axis   # the other spelling
    if axis not in HEATMAP_AXES:
        raise GridplanError(f"Unknown heatmap axis {axis!r}; choose one of "
                            f"{', '.join(HEATMAP_AXES)}.")
    ok, skipped = _usable_cells(run)
    means = _cell_means(ok)
    sizes = _sizes(run)
    regularization_labels = run.axis_labels("regularization")
    fixed_capacity = None
    if axis == "capacity":
        row_labels = run.axis_labels("capacity")
        chosen = means.loc[means.groupby(["capacity_index", "size_index"])["validation"].idxmin()]
        row_key = "capacity_index"
    else:
        fixed_capacity = _resolve_capacity(run, capacity, means)
        row_labels = regularization_labels
        chosen = means[means["capacity_index"] == fixed_capacity]
        row_key = "regularization_index"
    shape = (len(row_labels), len(sizes))
    values = np.full(shape, np.nan)
    validation = np.full(shape, np.nan)
    regularization = np.full(shape, -1, dtype=int)
    counts = np.zeros(shape, dtype=int)
    for row in chosen.itertuples(index=False):
        i, j = int(getattr(row, row_key)), int(row.size_index)
        values[i, j] = getattr(row, show)
        validation[i, j] = row.validation
        regularization[i, j] = int(row.regularization_index)
        counts[i, j] = int(row.folds)
    annotations = np.full(shape, "", dtype=object)
    short = _short_param(run, "regularization")
    in_cells = _compact_labels(regularization_labels)
    for (i, j), value in np.ndenumerate(values):
        if not np.isfinite(value):
            continue
        text = _value_text(value)
        if axis == "capacity" and len(regularization_labels) > 1:
            text += f"\n{short}={in_cells[regularization[i, j]]}"
        annotations[i, j] = text
    return HeatmapData(show=show, axis=axis, values=values, validation=validation,
                       annotations=annotations, row_labels=row_labels, sizes=sizes,
                       regularization_index=regularization, fold_counts=counts,
                       capacity_index=fixed_capacity, skipped_rows=skipped)


def _colour_norm(values: np.ndarray):
    """Log scale for positive values spanning more than LOG_SCALE_RATIO, else linear."""
    from matplotlib.colors import LogNorm, Normalize
    finite = values[np.isfinite(values)]
    low, high = float(finite.min()), float(finite.max())
    if low > 0 and high / low > LOG_SCALE_RATIO:
        return LogNorm(vmin=low, vmax=high)
    if high == low:
        high = low + (abs(low) or 1.0) * 1e-9
    return Normalize(vmin=low, vmax=high)


# --- advice on the heatmap --------------------------------------------------------------

STATE_KEYS = ("state", "reaches", "reached", "to", "setting", "result")

#: Advice marks sit towards a cell's upper right corner, clear of the cell's text.
ADVICE_OFFSET = (0.32, 0.26)


def _column_position(size: float, sizes: Sequence[int]) -> float:
    """x coordinate of a training size: cell centres at j + 0.5, log-linear between and beyond."""
    logs = np.log(np.asarray(sizes, dtype=float))
    if len(logs) == 1:
        return 0.5
    where = math.log(max(float(size), 1e-12))
    centres = np.arange(len(logs)) + 0.5
    if where <= logs[0]:
        return float(0.5 + (where - logs[0]) / (logs[1] - logs[0]))
    if where >= logs[-1]:
        return float(centres[-1] + (where - logs[-1]) / (logs[-1] - logs[-2]))
    return float(np.interp(where, logs, centres))


def _state_of(entry: Mapping[str, Any], previous: dict[str, Any], run: "Run") -> dict[str, Any]:
    """capacity_index / regularization_index / train_size of an advice entry, carrying
    over whatever the entry does not say from the previous state."""
    source: Mapping[str, Any] = entry
    for key in STATE_KEYS:
        if isinstance(entry.get(key), Mapping):
            source = {**entry, **entry[key]}
            break
    state = dict(previous)
    for axis in HEATMAP_AXES:
        index_key = f"{axis}_index"
        if source.get(index_key) is not None:
            state[index_key] = int(source[index_key])
        elif source.get(axis) is not None and str(source[axis]) in run.axis_labels(axis):
            state[index_key] = run.axis_labels(axis).index(str(source[axis]))
    for key in ("train_size", "size", "samples"):
        if isinstance(source.get(key), (int, float, np.integer, np.floating)):
            state["train_size"] = float(source[key])
            break
    return state


def _number_text(value: Any) -> str:
    if not isinstance(value, (int, float, np.integer, np.floating)) or not math.isfinite(value):
        return str(value)
    return f"{value:,.0f}" if abs(value) >= 100 else f"{value:.3g}"


def _step_text(number: int, step: Mapping[str, Any], state: Mapping[str, Any], run: "Run") -> str:
    action = str(step.get("action", "step"))
    where = []
    if "capacity_index" in state:
        where.append(f"{_short_param(run, 'capacity')} {run.axis_labels('capacity')[state['capacity_index']]}")
    if "regularization_index" in state and len(run.axis_labels("regularization")) > 1:
        where.append(f"{_short_param(run, 'regularization')} "
                     f"{run.axis_labels('regularization')[state['regularization_index']]}")
    if "train_size" in state:
        where.append(f"{_number_text(state['train_size'])} rows")
    parts = [f"{number}. {action}" + (f" -> {', '.join(where)}" if where else "")]
    money = []
    if step.get("cost") is not None:
        money.append(f"cost {_number_text(step['cost'])}")
    if step.get("cumulative_cost") is not None:
        money.append(f"total {_number_text(step['cumulative_cost'])}")
    if step.get("predicted_error") is not None:
        money.append(f"predicted error {_number_text(step['predicted_error'])}")
    return parts[0] + (f" ({', '.join(money)})" if money else "")


def _advice_path(advice: Mapping[str, Any], run: "Run") -> tuple[dict | None, list[tuple[dict, dict]]]:
    """The operating point's state and (step, state reached) for each plan step.

    States in another model of the run than `run`'s are empty (not drawn here).
    """
    here = getattr(run, "model_name", None)

    def elsewhere(where: Any) -> bool:
        return isinstance(where, Mapping) and where.get("model") not in (None, here)

    start = advice.get("operating_point")
    state = _state_of(start, {}, run) if isinstance(start, Mapping) and not elsewhere(start) else None
    steps = []
    current = dict(state or {})
    for step in advice.get("plan") or []:
        if not isinstance(step, Mapping):
            continue
        if elsewhere(step.get("to")):
            current = {}
            steps.append((step, {}))
            continue
        current = _state_of(step, current, run)
        steps.append((step, dict(current)))
    return state, steps


def _step_groups(points: list[tuple[float, float] | None]) -> list[tuple[list[int], tuple[float, float]]]:
    """Plan steps (numbered from 1) grouped where consecutive steps land on the same spot."""
    groups: list[tuple[list[int], tuple[float, float]]] = []
    for number, point in enumerate(points[1:], 1):
        if point is None:
            continue
        if groups and groups[-1][1] == point and groups[-1][0][-1] == number - 1:
            groups[-1][0].append(number)
        else:
            groups.append(([number], point))
    return groups


def _numbers_text(numbers: list[int]) -> str:
    return str(numbers[0]) if len(numbers) == 1 else f"{numbers[0]}-{numbers[-1]}"


def _draw_advice(ax: "Axes", data: HeatmapData, advice: Mapping[str, Any], run: "Run") -> list[str]:
    """Mark the operating point and the plan path; returns the note lines for the plan."""
    row_key = "capacity_index" if data.axis == "capacity" else "regularization_index"

    def position(state: Mapping[str, Any] | None) -> tuple[float, float] | None:
        if not state or row_key not in state or "train_size" not in state:
            return None
        if data.axis == "regularization" and state.get("capacity_index") not in (None, data.capacity_index):
            return None
        return (_column_position(state["train_size"], data.sizes) + ADVICE_OFFSET[0],
                state[row_key] + 0.5 + ADVICE_OFFSET[1])

    start, steps = _advice_path(advice, run)
    points = [position(start)] + [position(s) for _, s in steps]
    drawn = [p for p in points if p is not None]
    if drawn:
        right = max(x for x, _ in drawn)
        if right > len(data.sizes):
            edge = right + 0.6
            ax.axvspan(len(data.sizes), edge, facecolor=BEYOND_GRID_COLOUR, edgecolor="none",
                       zorder=0.5, gid="beyond-grid")
            ax.text((len(data.sizes) + edge) / 2, 0.08, "beyond\nmeasured\nsizes",
                    ha="center", va="bottom", fontsize=7, color="#333333", gid="beyond-grid-label")
            ax.set_xlim(0, edge)
    if len(drawn) > 1:
        ax.plot([p[0] for p in drawn], [p[1] for p in drawn], color=PLAN_COLOUR, linewidth=2.2,
                zorder=4, path_effects=_stroke(4.0), gid="plan-path",
                label="plan (numbered steps)")
    previous = None
    for point in drawn:
        if previous is not None and point != previous:
            ax.annotate("", xy=point, xytext=previous, zorder=4,
                        arrowprops=dict(arrowstyle="-|>", color=PLAN_COLOUR, lw=2.2,
                                        shrinkA=6, shrinkB=8, path_effects=_stroke(4.0)))
        previous = point
    for numbers, point in _step_groups(points):
        if points[0] is not None and point == points[0]:
            point = (point[0] - 0.24, point[1])  # beside the operating point, not on it
        ax.text(point[0], point[1], _numbers_text(numbers), ha="center", va="center", fontsize=7,
                fontweight="bold", color="black", zorder=6, gid="plan-step",
                bbox=dict(boxstyle="round,pad=0.25", facecolor=PLAN_COLOUR, edgecolor="black"))
    if points[0] is not None:
        ax.plot([points[0][0]], [points[0][1]], marker="D", markersize=10, color="white",
                markeredgecolor="black", markeredgewidth=1.6, linestyle="none", zorder=5,
                gid="operating-point", label="operating point (today)")
    notes = []
    if steps:
        notes.append("Plan (numbered on the map):")
        notes += ["  " + _step_text(n, step, state, run) for n, (step, state) in enumerate(steps, 1)]
    if data.axis == "regularization":
        hidden = sum(p is None for p in points[1:])
        if hidden:
            notes.append(f"  {plural(hidden, 'plan step')} at another capacity not drawn on this map.")
        if start is not None and points[0] is None:
            notes.append("  The operating point is at another capacity and is not drawn on this map.")
    return notes


# --- heatmap figure ----------------------------------------------------------------------

def _add_notes(figure: "Figure", ax_notes: "Axes", lines: list[str]) -> None:
    ax_notes.set_axis_off()
    ax_notes.set_label("notes")
    if lines:
        ax_notes.text(0.0, 1.0, "\n".join(lines), ha="left", va="top", fontsize=8,
                      transform=ax_notes.transAxes, gid="notes-text")


def heatmap_figure(run: "Run", show: str = "validation", axis: str = "capacity",
                   capacity: str | int | None = None, advice: Mapping[str, Any] | None = None,
                   target: float | None = None) -> "Figure":
    """Heatmap of the grid: capacity (or regularisation at one capacity) x training rows.

    Cells hold the mean over usable folds of `show` (validation, train or
    gap); cells whose validation error meets the target (default: the
    config's) are outlined; the operating point and the plan are drawn when
    `advice` is given.
    """
    import seaborn as sns

    data = heatmap_data(run, show, axis, capacity)
    target = _target_default(run, target)
    if not np.isfinite(data.values).any():
        raise GridplanError("No cell of this heatmap has a usable result to draw.")
    n_rows, n_cols = data.values.shape
    notes = _heatmap_notes(run, data, target)
    plan_lines = len((advice or {}).get("plan") or []) + 1 if advice else 0
    notes_height = 0.16 * (len(notes) + plan_lines) + 0.15
    row_height = 0.78 if advice else 0.62
    figure = _new_figure(2.6 + 0.95 * n_cols + (0.9 if advice else 0.0),
                         1.6 + row_height * n_rows + notes_height)
    grid = figure.add_gridspec(2, 1, height_ratios=[1.4 + row_height * n_rows, notes_height])
    ax = figure.add_subplot(grid[0])
    ax.set_label("heatmap")
    colour_label = f"{SHOW_TITLES[data.show].lower()}, {_metric_name(run)}"
    sns.heatmap(np.ma.masked_invalid(data.values), ax=ax, cmap=HEATMAP_COLORMAP,
                norm=_colour_norm(data.values), annot=data.annotations, fmt="",
                annot_kws={"fontsize": 8 if n_cols <= 10 else 6.5},
                linewidths=0.6, linecolor="white",
                xticklabels=[f"{m:,}" for m in data.sizes], yticklabels=data.row_labels,
                cbar_kws={"label": colour_label})
    ax.invert_yaxis()  # the first (smallest) capacity or regularisation at the bottom
    _plain_colourbar_ticks(ax.collections[0].colorbar)
    ax.set_xlabel("training rows")
    ax.set_ylabel(_axis_title(run, data.axis))
    ax.tick_params(axis="y", rotation=0)
    ax.tick_params(axis="x", rotation=0 if n_cols <= 10 else 45)
    ax.set_title(_heatmap_title(run, data), fontsize=10, loc="left")
    if target is not None:
        _outline_target_cells(ax, data, target)
    if advice:
        notes += _draw_advice(ax, data, advice, run)
    handles = [h for h in ax.get_lines() if not h.get_label().startswith("_")]
    if target is not None and (data.validation <= target).any():
        from matplotlib.patches import Patch
        handles.append(Patch(facecolor="none", edgecolor="white", linewidth=1.4,
                             path_effects=_stroke(3.2),
                             label=f"validation error at or below the target {target:g}"))
    if handles:
        ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(0.0, -0.12 if n_cols <= 10 else -0.2),
                  ncols=2, fontsize=8, frameon=False)
    _add_notes(figure, figure.add_subplot(grid[1]), notes)
    return figure


def _heatmap_title(run: "Run", data: HeatmapData) -> str:
    what = SHOW_TITLES[data.show]
    if data.axis == "capacity":
        reg = "" if len(run.axis_labels("regularization")) <= 1 else (
            f"\neach cell at the {_short_param(run, 'regularization')} with the lowest "
            "validation error (named under the value)")
        return f"{what} by capacity and training rows{reg}"
    label = run.axis_labels("capacity")[data.capacity_index]
    return (f"{what} by regularisation and training rows\nat "
            f"{_short_param(run, 'capacity')} {label}")


def _heatmap_notes(run: "Run", data: HeatmapData, target: float | None) -> list[str]:
    folds = run.meta.get("folds")
    repeats = run.meta.get("repeats", 1)
    lines = [f"Each value is the mean over {plural(folds, 'fold')} x {plural(repeats, 'repeat')} of "
             f"{_metric_name(run)}; the colour scale is "
             f"{'logarithmic' if _colour_norm(data.values).__class__.__name__ == 'LogNorm' else 'linear'}."]
    if target is None:
        lines.append("No target error is set, so no cells are outlined.")
    else:
        met = int(np.sum(data.validation <= target))
        lines.append(f"Target validation error {target:g}: {plural(met, 'cell')} outlined meet it.")
    if data.skipped_rows:
        lines.append(f"{plural(data.skipped_rows, 'failed fit')} skipped; blank cells have no usable fold.")
    return lines


def _plain_colourbar_ticks(colourbar) -> None:
    """Label a logarithmic colour bar with plain numbers at 1-2-5 steps."""
    from matplotlib.colors import LogNorm
    from matplotlib.ticker import FixedLocator, FuncFormatter, NullLocator
    norm = colourbar.norm
    if not isinstance(norm, LogNorm):
        return
    ticks = [m * 10.0 ** k for k in range(math.floor(math.log10(norm.vmin)) - 1,
                                          math.ceil(math.log10(norm.vmax)) + 1) for m in (1, 2, 5)]
    ticks = [t for t in ticks if norm.vmin <= t <= norm.vmax]
    colourbar.ax.yaxis.set_major_locator(FixedLocator(ticks))
    colourbar.ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    colourbar.ax.yaxis.set_minor_locator(NullLocator())


def _outline_target_cells(ax: "Axes", data: HeatmapData, target: float) -> None:
    from matplotlib.patches import Rectangle
    for (i, j), value in np.ndenumerate(data.validation):
        if np.isfinite(value) and value <= target:
            ax.add_patch(Rectangle((j + 0.05, i + 0.05), 0.9, 0.9, fill=False, edgecolor="white",
                                   linewidth=1.4, zorder=3, gid="target-cell",
                                   path_effects=_stroke(3.2)))


# --- learning curves ----------------------------------------------------------------------

@dataclass
class CurvePoints:
    """Measured errors of one setting per training size: means and fold ranges."""

    sizes: np.ndarray
    validation_mean: np.ndarray
    validation_low: np.ndarray
    validation_high: np.ndarray
    train_mean: np.ndarray
    train_low: np.ndarray
    train_high: np.ndarray
    skipped_rows: int


def curve_points(cells: pd.DataFrame, capacity_index: int, regularization_index: int) -> CurvePoints:
    """Means and lowest/highest fold of training and validation error per size (ok rows only)."""
    rows = cells[(cells["capacity_index"] == capacity_index)
                 & (cells["regularization_index"] == regularization_index)]
    ok = rows[rows["status"] == "ok"]
    stats = ok.groupby("train_size").agg(
        validation_mean=("validation_error", "mean"), validation_low=("validation_error", "min"),
        validation_high=("validation_error", "max"), train_mean=("train_error", "mean"),
        train_low=("train_error", "min"), train_high=("train_error", "max")).sort_index()
    return CurvePoints(sizes=stats.index.to_numpy(dtype=float),
                       **{c: stats[c].to_numpy(dtype=float) for c in stats.columns},
                       skipped_rows=int(len(rows) - len(ok)))


def _level_text(value: float, scale: float) -> str:
    """An error level to 3 significant figures, with round-off dust (below 1e-6 x scale) as 0."""
    return "0" if abs(value) < 1e-6 * abs(scale) else f"{value:.3g}"


def _panel_top(points: CurvePoints, fit: "CurveFit | None", target: float | None,
               confidence: float) -> float:
    """Upper y limit: the highest value drawn, capped at CURVE_TOP_FACTOR x the reference level."""
    values = [points.validation_high, points.train_high]
    if fit is not None:
        values.append(np.atleast_1d(fit.band(float(points.sizes[-1]), confidence)[1]))
    highest = max(float(np.nanmax(v)) for v in values if np.size(v))
    reference = max(float(points.validation_mean[-1]), target or 0.0)
    return 1.05 * min(highest, CURVE_TOP_FACTOR * reference) if reference > 0 else 1.05 * highest


def _draw_curves(ax: "Axes", points: CurvePoints, fit: "CurveFit | None", target: float | None,
                 confidence: float, compact: bool = False) -> list[str]:
    """Draw one setting's curves on `ax`; returns notes about what could not be drawn."""
    notes = []
    size = 4 if compact else 5
    ax.fill_between(points.sizes, points.train_low, points.train_high, color=TRAINING_COLOUR,
                    alpha=0.18, linewidth=0, gid="train-folds", label="_training folds")
    ax.fill_between(points.sizes, points.validation_low, points.validation_high,
                    color=VALIDATION_COLOUR, alpha=0.18, linewidth=0, gid="validation-folds",
                    label="_validation folds")
    ax.plot(points.sizes, points.train_mean, color=TRAINING_COLOUR, marker="s", markersize=size,
            linewidth=1.6, gid="train-mean", label="training error (mean; band: fold range)")
    ax.plot(points.sizes, points.validation_mean, color=VALIDATION_COLOUR, marker="o",
            markersize=size, linewidth=1.8, gid="validation-mean",
            label="validation error (mean; band: fold range)")
    largest = float(points.sizes[-1])
    if fit is not None:
        inside = np.geomspace(float(fit.sizes[0]), float(fit.sizes[-1]), 60)
        ax.plot(inside, fit.predict(inside), color=VALIDATION_COLOUR, linewidth=0.9, alpha=0.55,
                gid="fit", label=f"fitted curve ({fit.family})")
        start = float(fit.sizes[-1])
        ahead = np.geomspace(start, FORECAST_FACTOR * start, 60)
        low, high = fit.band(ahead, confidence)
        ax.fill_between(ahead, low, high, facecolor="none", edgecolor=VALIDATION_COLOUR,
                        hatch="////", linewidth=0, alpha=0.7, gid="forecast-band",
                        label=f"_forecast band ({confidence:.0%})")
        ax.plot(ahead, fit.predict(ahead), color=VALIDATION_COLOUR, linestyle="--", linewidth=1.8,
                gid="forecast", label=f"forecast to {FORECAST_FACTOR:g}x with {confidence:.0%} band")
        floor_low, floor_high = fit.asymptote_band(confidence)
        scale = float(np.nanmax(points.validation_mean))
        floor_text = ", ".join(_level_text(v, scale) for v in (floor_low, floor_high))
        ax.axhline(fit.asymptote, color=FLOOR_COLOUR, linestyle=":", linewidth=1.5, gid="plateau",
                   label=f"plateau of this setting {_level_text(fit.asymptote, scale)} [{floor_text}]")
        largest = FORECAST_FACTOR * start
    else:
        notes.append("no curve fitted, so no forecast")
    if target is not None:
        ax.axhline(target, color=TARGET_COLOUR, linestyle="-.", linewidth=1.3, gid="target",
                   label=f"target {target:g}")
    ax.set_xscale("log")
    _plain_size_ticks(ax)
    ax.set_xlim(float(points.sizes[0]) / 1.15, largest * 1.15)
    ax.set_ylim(0.0, _panel_top(points, fit, target, confidence))
    if np.nanmax(np.concatenate([points.validation_high, points.train_high])) > ax.get_ylim()[1]:
        notes.append(CUT_OFF_NOTE)
    ax.grid(True, which="major", color="#e6e6e6", linewidth=0.7)
    ax.set_axisbelow(True)
    if points.skipped_rows:
        notes.append(f"{plural(points.skipped_rows, 'failed fit')} skipped")
    return notes


def _plain_size_ticks(ax: "Axes") -> None:
    """Training-size ticks as plain numbers (20, 50, 100, 1,000) on the log axis."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullLocator
    ax.xaxis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
    ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:,.0f}"))
    ax.xaxis.set_minor_locator(NullLocator())   # the 1-2-5 ticks suffice; minor ones cost time


def _setting_title(run: "Run", capacity_index: int, regularization_index: int) -> str:
    text = f"{_short_param(run, 'capacity')} {run.axis_labels('capacity')[capacity_index]}"
    regularization = run.axis_labels("regularization")
    if len(regularization) > 1:
        text += f", {_short_param(run, 'regularization')} {regularization[regularization_index]}"
    return text


def _fit_for(fits: Mapping | None, key: tuple[int, int]) -> "CurveFit | None":
    return None if fits is None else fits.get(key)


def curve_figure(run: "Run", fits: Mapping[tuple[int, int], "CurveFit"] | None,
                 setting: Sequence[Any], target: float | None = None,
                 confidence: float | None = None) -> "Figure":
    """Training and validation curves of one setting with fold bands, forecast, floor and target.

    `setting` is (capacity, regularisation) as two labels or two indices;
    `target`/`confidence` default to the config's.
    """
    key = _resolve_setting(run, setting)
    target = _target_default(run, target)
    confidence = _confidence_default(run, confidence)
    points = curve_points(run.cells(), *key)
    if points.sizes.size == 0:
        raise GridplanError(f"Setting {_setting_title(run, *key)} has no successful fits to draw.")
    figure = _new_figure(7.0, 5.0)
    ax = figure.add_subplot()
    ax.set_label("curves")
    notes = _draw_curves(ax, points, _fit_for(fits, key), target, confidence)
    ax.set_title(f"Learning curves at {_setting_title(run, *key)}"
                 + "".join(f"\n({note})" for note in notes), fontsize=10, loc="left")
    ax.set_xlabel("training rows (log scale)")
    ax.set_ylabel(_metric_name(run))
    ax.legend(fontsize=8, loc="best", frameon=True, framealpha=0.9)
    return figure


def small_multiples_settings(run: "Run", max_panels: int = DEFAULT_MAX_PANELS) -> list[tuple[int, int]]:
    """The settings a small-multiples page shows, in capacity order.

    One per capacity, at the regularisation with the lowest mean validation
    error at the largest size that capacity measured (lowest index on ties).
    With more capacities than `max_panels`, `max_panels` of them evenly spaced
    along the capacity axis are kept, always the smallest and the largest.
    """
    if max_panels < 1:
        raise GridplanError(f"max_panels must be at least 1, got {max_panels}.")
    ok, _ = _usable_cells(run)
    means = _cell_means(ok)
    chosen = []
    for cap, rows in means.groupby("capacity_index", sort=True):
        at_largest = rows[rows["size_index"] == rows["size_index"].max()]
        best = at_largest.sort_values(["validation", "regularization_index"]).iloc[0]
        chosen.append((int(cap), int(best["regularization_index"])))
    if len(chosen) > max_panels:
        keep = sorted({int(round(i)) for i in np.linspace(0, len(chosen) - 1, max_panels)})
        chosen = [chosen[i] for i in keep]
    return chosen


def small_multiples_figure(run: "Run", fits: Mapping[tuple[int, int], "CurveFit"] | None,
                           target: float | None = None, max_panels: int = DEFAULT_MAX_PANELS,
                           confidence: float | None = None,
                           settings: Iterable[Sequence[Any]] | None = None) -> "Figure":
    """A grid of learning-curve panels sharing one y axis.

    By default the settings come from `small_multiples_settings` (the best
    regularisation per capacity, at most `max_panels`); pass `settings` to choose.
    """
    target = _target_default(run, target)
    confidence = _confidence_default(run, confidence)
    keys = (small_multiples_settings(run, max_panels) if settings is None
            else [_resolve_setting(run, s) for s in settings][:max_panels])
    if not keys:
        raise GridplanError("No settings were given to draw.")
    cells = run.cells()
    panels = [(key, curve_points(cells, *key)) for key in keys]
    panels = [(key, points) for key, points in panels if points.sizes.size]
    if not panels:
        raise GridplanError(f"{run.run_dir} holds no successful fits to draw.")
    n_cols = min(4, math.ceil(math.sqrt(len(panels))))
    n_rows = math.ceil(len(panels) / n_cols)
    figure = _new_figure(0.4 + 3.4 * n_cols, 1.5 + 2.7 * n_rows)
    axes = figure.subplots(n_rows, n_cols, sharex=False, sharey=True, squeeze=False)
    top = 0.0
    for n, (key, points) in enumerate(panels):
        ax = axes.flat[n]
        ax.set_label(f"panel {key[0]},{key[1]}")
        notes = _draw_curves(ax, points, _fit_for(fits, key), target, confidence, compact=True)
        top = max(top, ax.get_ylim()[1])
        notes = [note for note in notes if note != CUT_OFF_NOTE]
        title = _setting_title(run, *key)
        ax.set_title(title + ("".join(f"\n({note})" for note in notes)), fontsize=8.5)
        ax.tick_params(labelsize=7.5)
    for ax in axes.flat[len(panels):]:
        ax.set_visible(False)
    for ax in axes.flat[:len(panels)]:
        ax.set_ylim(0.0, top)
    cut_off = sum(bool(np.nanmax(np.concatenate([p.validation_high, p.train_high])) > top)
                  for _, p in panels)
    for ax in axes[-1, :]:
        ax.set_xlabel("training rows (log scale)", fontsize=8)
    for ax in axes[:, 0]:
        ax.set_ylabel(_metric_name(run), fontsize=8)
    handles, labels = _legend_entries(axes.flat[0], generic=True)
    if cut_off:
        labels = labels + [f"{cut_off} panel(s): errors above {top:.3g} at small sizes run off the top"]
        from matplotlib.lines import Line2D
        handles = handles + [Line2D([], [], color="none")]
    figure.legend(handles, labels, loc="outside lower center", ncols=3, fontsize=8, frameon=False)
    chosen = "chosen settings" if settings is not None else (
        "best regularisation per capacity" if len(run.axis_labels("regularization")) > 1 else "each capacity")
    figure.suptitle(f"Learning curves, {chosen} ({_metric_name(run)})", fontsize=11, x=0.02,
                    ha="left")
    return figure


def _legend_entries(ax: "Axes", generic: bool) -> tuple[list, list[str]]:
    """One panel's legend entries, with setting-specific numbers dropped for a shared legend."""
    handles, labels = ax.get_legend_handles_labels()
    if generic:
        labels = ["plateau of each setting" if label.startswith("plateau of this setting") else
                  "fitted curve" if label.startswith("fitted curve") else label for label in labels]
    return handles, labels


# --- saving ----------------------------------------------------------------------------------

def _svg_settings():
    import matplotlib
    return matplotlib.rc_context({"svg.hashsalt": "gridplan", "svg.fonttype": "path"})


def save_figure(figure: "Figure", path: str | Path, dpi: int = PNG_DPI) -> Path:
    """Write a figure as PNG or SVG, chosen by the file extension; returns the path.

    The picture goes to a temporary file beside `path` that then replaces it,
    so a failed or interrupted save leaves no half-written file.
    """
    from gridplan.common.files import replaced
    path = Path(path)
    kind = path.suffix.lower().lstrip(".")
    if kind not in FIGURE_FORMATS:
        raise GridplanError(f"Cannot draw to {str(path)!r}: choose a file name ending in .png or .svg.")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        with replaced(path) as temporary:
            if kind == "svg":
                with _svg_settings():
                    figure.savefig(temporary, format="svg", metadata={"Date": None})
            else:
                figure.savefig(temporary, format="png", dpi=dpi)
    except OSError as exc:
        reason = exc.strerror or str(exc)
        raise GridplanError(f"Cannot write {path}: {reason}.") from None
    return path


def figure_to_png_bytes(figure: "Figure", dpi: int = PNG_DPI) -> bytes:
    """The figure as PNG bytes (for embedding in a report)."""
    import io
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=dpi)
    return buffer.getvalue()


def figure_to_svg_text(figure: "Figure") -> str:
    """The figure as SVG text (for embedding in a report), without a date stamp."""
    import io
    buffer = io.StringIO()
    with _svg_settings():
        figure.savefig(buffer, format="svg", metadata={"Date": None})
    return buffer.getvalue()
