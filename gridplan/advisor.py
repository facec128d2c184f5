"""Advice for a finished run: curves -> diagnosis -> plan, as a JSON-ready dict and as text.

`advise(run_dir, target=...)` reads the run only through the store
(`gridplan.api.open_run`), fits the learning curves, diagnoses every setting
and the operating point, and plans the cheapest way to the target under the
config's costs (options override them).  `render_advice` turns the dict into
terminal text.
"""

from __future__ import annotations

import dataclasses
import math
from pathlib import Path

import numpy as np
import pandas as pd

from gridplan.api import open_run
from gridplan.config import Costs
from gridplan.curves import DEFAULT_BOOT, DEFAULT_MAX_SIZE, GridCurves
from gridplan.diagnosis import (
    NoiseFloor,
    Thresholds,
    corrected_t_test,
    diagnose_grid,
    diagnose_setting,
    Plateau,
    best_plateau,
    estimate_noise_floor,
)
from gridplan.errors import GridplanError
from gridplan.wording import sig
from gridplan.jsonable import plain as _plain
from gridplan.planner import (
    CostModel,
    State,
    build_state_graph,
    cheapest_plan,
    costs_to_goal,
    rank_first_moves,
    size_ladder,
    state_error_forecasts,
)


# --- reading the user's choices ---------------------------------------------------------

def parse_operating_point(at: str, capacity_labels: list[str],
                          regularization_labels: list[str]) -> tuple[int, int]:
    """'CAPACITY,REG' labels -> indices; capacity labels may contain commas themselves.

    Numbers match by value, so `1e-6`, `1e-06` and `0.000001` name the same setting.
    """
    text = at.strip()

    def find(word: str, labels: list[str]) -> int | None:
        word = word.strip()
        if word in labels:
            return labels.index(word)
        number = _as_number(word)
        if number is None:
            return None
        matches = [i for i, label in enumerate(labels)
                   if (value := _as_number(label)) is not None
                   and math.isclose(value, number, rel_tol=1e-9, abs_tol=0.0)]
        return matches[0] if len(matches) == 1 else None

    if len(regularization_labels) == 1 and find(text, capacity_labels) is not None:
        return find(text, capacity_labels), 0
    for cut in [i for i, ch in enumerate(text) if ch == ","]:
        ci, ri = find(text[:cut], capacity_labels), find(text[cut + 1:], regularization_labels)
        if ci is not None and ri is not None:
            return ci, ri
    raise GridplanError(
        f"at {at!r} names no setting of this grid; give CAPACITY,REG with capacity one of "
        f"{', '.join(capacity_labels)} and regularisation one of {', '.join(regularization_labels)}.")


def _as_number(text: str) -> float | None:
    try:
        value = float(text)
    except ValueError:
        return None
    return value if math.isfinite(value) else None


def _cost_model(config, overrides: dict) -> CostModel:
    """The config's costs (its defaults without a config), with the given overrides."""
    base = config.costs if config is not None else Costs()
    values = {**dataclasses.asdict(base),
              **{key: value for key, value in overrides.items() if value is not None}}
    return CostModel(**values)


def _resolve_target(target, config) -> float:
    if target is None:
        target = config.target_error if config is not None else None
    if target is None:
        raise GridplanError("no target error given: pass --target or set [goal] target in the config.")
    if isinstance(target, bool) or not isinstance(target, (int, float)) or not math.isfinite(target) \
            or target <= 0:
        raise GridplanError(f"the target error must be a positive number, got {target!r}.")
    return float(target)


def _resolve_confidence(confidence, config) -> float:
    if confidence is None:
        confidence = config.confidence if config is not None else 0.9
    if isinstance(confidence, bool) or not isinstance(confidence, (int, float)) \
            or not 0.5 <= confidence < 1:
        raise GridplanError(f"--confidence must lie in [0.5, 1), got {confidence!r}.")
    return float(confidence)


# --- measured states and compute time ---------------------------------------------------------

def _measured_states(ok: pd.DataFrame, size: int, n_test: float,
                     confidence: float) -> dict[State, tuple[float, float, float]]:
    """Mean validation error at `size` per setting, with its corrected-t interval."""
    out = {}
    for (ci, ri), rows in ok[ok["train_size"] == size].groupby(
            ["capacity_index", "regularization_index"]):
        errors = rows["validation_error"].to_numpy(dtype=float)
        test = corrected_t_test(errors, size, n_test, confidence)
        mean = float(np.mean(errors))
        low, high = (test.low, test.high) if test is not None else (mean, mean)
        out[State(int(ci), int(ri), int(size))] = (mean, low, high)
    return out


def _fit_time_model(ok: pd.DataFrame):
    """Expected seconds of one fit at a state: measured mean at the nearest measured size below, scaled by size."""
    table = ok.groupby(["capacity_index", "regularization_index", "train_size"])["fit_seconds"].mean()

    def seconds(state: State) -> float:
        try:
            per_setting = table.loc[(state.capacity_index, state.regularization_index)]
        except KeyError:
            return 0.0
        below = per_setting[per_setting.index <= state.size]
        size, value = (below.index[-1], below.iloc[-1]) if len(below) else (
            per_setting.index[0], per_setting.iloc[0])
        return float(value) * state.size / float(size)

    return seconds


def _bracket_bottoms(curves: dict, confidence: float) -> dict[tuple[int, int], float]:
    """Training error at the largest size for settings whose asymptote band lies below their own data."""
    out = {}
    for key, fit in curves.items():
        check = fit.midpoint_check(confidence)
        if check["disagree"] and check["train_at_largest"] is not None \
                and fit.asymptote_band(confidence)[1] < min(check["train_at_largest"],
                                                            check["validation_at_largest"]):
            out[key] = float(min(check["train_at_largest"], check["validation_at_largest"]))
    return out


# --- the binding limit ---------------------------------------------------------------------------

def _floor_at_capacity_edge(curves: dict, floor: NoiseFloor, n_capacity: int,
                            confidence: float) -> bool:
    """True when the floor comes from the largest capacity and one step less is clearly worse.

    "Clearly worse": every setting one capacity step lower has an asymptote
    band lying wholly above the floor's band.  A grid with one capacity counts
    as at the edge (it cannot tell noise from bias).
    """
    if floor.capacity_index != n_capacity - 1:
        return False
    lower = [f for (ci, _), f in curves.items() if ci == n_capacity - 2]
    return all(f.asymptote_band(confidence)[0] > floor.high for f in lower)


def binding_limit(curves: dict, floor: NoiseFloor | None, plateau: Plateau | None,
                  target: float, confidence: float, top_size: int, capped_by_user: bool,
                  bottoms: dict, labels, n_capacity: int, size: int) -> tuple[str, int | None, str]:
    """(short limit name, rows to label next or None, sentence) for a target no plan reaches.

    Checked in order: the floor sits at the grid's capacity edge (capacity
    range); the data's noise floor is known and its band lies above the target
    (noise floor: only new information helps) or holds it; some setting's
    band reaches the target beyond the ladder's top size (max_samples); some
    setting's central forecast reaches it but its band does not (forecast too
    uncertain: measure more); every setting levels off above the target while
    the data's floor is unknown (model plateau); otherwise the capacity range.
    """
    if floor is not None and target <= floor.high and _floor_at_capacity_edge(curves, floor, n_capacity,
                                                                          confidence):
        return ("capacity range", None,
                f"the lowest error any setting approaches, {floor.value:.3g} [{floor.low:.3g}, "
                f"{floor.high:.3g}], is at the grid's largest capacity and still falling with "
                f"capacity, so it may be bias rather than noise: extend the grid (more capacity).")
    if floor is not None and target < floor.low:
        return ("noise floor", None,
                f"the target {target:.3g} is below the data's noise floor {floor.value:.3g} "
                f"[{floor.low:.3g}, {floor.high:.3g}] ({floor.evidence}): more data or more "
                f"capacity will not help; only new information (better features or cleaner "
                f"labels) can.")
    if floor is not None and target <= floor.high:
        return ("noise floor", None,
                f"the target {target:.3g} is inside the noise-floor band {floor.value:.3g} "
                f"[{floor.low:.3g}, {floor.high:.3g}]: with the data at hand no plan reaches it at "
                f"{confidence:.0%} confidence. More rows narrow that band (the best forecasts near "
                f"{floor.value:.3g} may then qualify); only new information (better features or "
                f"cleaner labels) lowers the floor itself.")
    best, central = None, None
    for key, fit in curves.items():
        if bottoms.get(key, 0.0) > target:
            continue
        need = fit.samples_needed(target, confidence, DEFAULT_MAX_SIZE)
        if need.reachable and (best is None or need.needed < best[1]):
            best = (key, need.needed)
        if need.point is not None and (central is None or need.point < central[1]):
            central = (key, need.point)
    if best is not None and best[1] > top_size:
        (ci, ri), needed = best
        cap = "max_samples" if capped_by_user else "the planning reach (no max_samples set)"
        return ("max_samples", None,
                f"the target needs about {needed:,} training rows (setting {labels(ci, ri)}), "
                f"beyond {cap} of {top_size:,}.")
    if central is not None:
        (ci, ri), rows = central
        more = max(size, min(rows, 4 * size) - size)
        return ("forecast too uncertain", more,
                f"setting {labels(ci, ri)} is forecast to reach the target near {rows:,} training "
                f"rows, but its {confidence:.0%} band does not get there; the forecast is too "
                f"uncertain to plan on. Label about {_about(more)} more rows and run again: measured "
                f"sizes narrow the band.")
    if plateau is not None and target < plateau.low:
        where = labels(plateau.capacity_index, plateau.regularization_index)
        return ("model plateau", None,
                f"every setting of this model levels off above the target: the lowest plateau is "
                f"{plateau.value:.3g} [{plateau.low:.3g}, {plateau.high:.3g}] (setting {where}). "
                f"That is this model's limit, not necessarily the data's: the noise floor is "
                f"unknown, so a more flexible model or more capacity may still reach the target.")
    return ("capacity range", None,
            "no setting of the grid reaches the target even with unlimited data: extend the grid "
            "(more capacity, other regularisation) or try another model.")


# --- the entry point ----------------------------------------------------------------------------

def advise(run_dir: str | Path, *, target: float | None = None, at: str | None = None,
           confidence: float | None = None, per_sample: float | None = None,
           capacity_step: float | None = None, regularization_step: float | None = None,
           max_samples: int | None = None, less_capacity_step: float | None = None,
           per_fit_second: float | None = None, thresholds: Thresholds | None = None,
           n_boot: int = DEFAULT_BOOT, seed: int = 0, curves: GridCurves | None = None) -> dict:
    """Diagnose a run at the operating point and plan the cheapest way to the target.

    `at` is "CAPACITY,REG" (labels); default: the setting with the lowest mean
    validation error at the largest measured size.  Costs and max_samples come
    from the run's config unless overridden here.  `curves` may pass curves
    already fitted on this run's cells (otherwise they are fitted with n_boot, seed).
    """
    run = open_run(run_dir)
    config = run.config
    if thresholds is None:
        thresholds = Thresholds(**(config.thresholds if config is not None else {}))
    target = _resolve_target(target, config)
    confidence = _resolve_confidence(confidence, config)
    costs = _cost_model(config, {"per_sample": per_sample, "capacity_step": capacity_step,
                                 "regularization_step": regularization_step,
                                 "max_samples": max_samples,
                                 "less_capacity_step": less_capacity_step,
                                 "per_fit_second": per_fit_second})
    cells = run.cells()
    ok = cells[cells["status"] == "ok"]
    if ok.empty:
        raise GridplanError(f"{run_dir} has no successful cells to advise on.")
    capacity_labels = [label for label, _ in run.axes.get("capacity", [])]
    regularization_labels = [label for label, _ in run.axes.get("regularization", [])]

    def labels(ci: int, ri: int) -> str:
        return f"{capacity_labels[ci]},{regularization_labels[ri]}"

    if curves is None:
        from gridplan.curvestore import cached_curves
        curves = cached_curves(run_dir, cells, n_boot=n_boot, seed=seed)
    test_sizes = run.meta.get("test_sizes") or []
    n_test = float(np.mean(test_sizes)) if test_sizes else float(
        run.meta.get("n_rows", 0)) / max(int(run.meta.get("folds", 5)), 1)
    floor = estimate_noise_floor(curves, confidence)
    plateau = best_plateau(curves, confidence)
    size = int(ok["train_size"].max())

    at_size = ok[ok["train_size"] == size]
    if at is None:
        means = at_size.groupby(["capacity_index", "regularization_index"])["validation_error"].mean()
        ci, ri = (int(v) for v in means.idxmin())
    else:
        ci, ri = parse_operating_point(at, capacity_labels, regularization_labels)
        if at_size[(at_size.capacity_index == ci) & (at_size.regularization_index == ri)].empty:
            raise GridplanError(f"operating point {at!r}: that setting has no successful cells at the largest "
                                f"training size {size:,}.")
    start = State(ci, ri, size)
    setting_rows = cells[(cells.capacity_index == ci) & (cells.regularization_index == ri)]
    # a floor found at the grid's capacity edge may be bias: the noise-floor verdict is off then
    floor_at_edge = floor is not None and _floor_at_capacity_edge(
        curves, floor, len(capacity_labels), confidence)
    verdict_floor = floor.value if floor is not None and not floor_at_edge else None
    here = diagnose_setting(setting_rows, curves.get((ci, ri)), target=target,
                            noise_floor=verdict_floor, n_test=n_test,
                            confidence=confidence, thresholds=thresholds, size=size)
    settings = diagnose_grid(cells, curves, target=target, n_test=n_test, confidence=confidence,
                             thresholds=thresholds, noise_floor=verdict_floor)

    if costs.max_samples is not None and costs.max_samples <= size:
        ladder = [size]
    else:
        ladder = size_ladder(size, costs.max_samples)
    bottoms = _bracket_bottoms(curves, confidence)
    forecast = state_error_forecasts(curves, _measured_states(ok, size, n_test, confidence),
                                     confidence=confidence,
                                     floor_low=floor.low if floor else None, bracket_bottom=bottoms,
                                     floor_value=floor.value if floor else None, sizes=ladder)
    states = build_state_graph(forecast, n_capacity=len(capacity_labels),
                               n_regularization=len(regularization_labels), ladder=ladder,
                               capacity_labels=capacity_labels, costs=costs, target=target,
                               fit_seconds=_fit_time_model(ok))
    if start not in states.forecasts:
        raise GridplanError(f"the operating point {labels(ci, ri)} at {size:,} has no usable results.")
    found = cheapest_plan(states.graph, start, states.is_goal)
    distance = costs_to_goal(states.graph, states.is_goal)
    reachable = found is not None
    limit = limit_detail = next_rows = None
    if not reachable:
        limit, next_rows, limit_detail = binding_limit(curves, floor, plateau, target, confidence,
                                            ladder[-1], costs.max_samples is not None, bottoms,
                                            labels, len(capacity_labels), size)

    def describe(state: State) -> dict:
        f = states.forecasts[state]
        return {"capacity": capacity_labels[state.capacity_index],
                "regularization": regularization_labels[state.regularization_index],
                "size": state.size, "predicted_error": f.point,
                "interval": [f.low, f.high], "error_at_confidence": f.predicted,
                "measured": f.measured}

    plan = []
    if found is not None:
        cumulative, current = 0.0, start
        for edge in found[1]:
            cumulative += edge.cost
            before, after = states.forecasts[current].point, states.forecasts[edge.target].point
            plan.append({"action": edge.action, "cost": edge.cost, "cumulative_cost": cumulative,
                         "predicted_error": after, "worse_on_the_way": bool(after > before),
                         "from": describe(current), "to": describe(edge.target)})
            current = edge.target

    actions = []
    for entry in rank_first_moves(states, start, distance):
        item = {"action": entry.action, "to": None, "step_cost": None, "predicted_error": None,
                "interval": None, "plan_cost": entry.plan_cost, "reachable": entry.reachable,
                "reason": entry.reason, "then": []}
        if entry.edge is not None:
            dest = describe(entry.edge.target)
            item.update(to=dest, step_cost=entry.edge.cost, predicted_error=dest["predicted_error"],
                        interval=dest["interval"])
            if entry.reachable:
                rest = cheapest_plan(states.graph, entry.edge.target, states.is_goal)
                item["then"] = [_step_words(e, capacity_labels, regularization_labels, run.meta)
                                for e in rest[1]]
            elif limit is not None:
                item["reason"] = f"{entry.reason} (binding limit: {limit}, above)"
        actions.append(item)

    failed = cells[cells["status"] != "ok"]
    skipped = [{"capacity": str(c), "regularization": str(r), "failed_rows": int(len(rows)),
                "example": str(rows["message"].iloc[0])[:200]}
               for (c, r), rows in failed.groupby(["capacity", "regularization"], sort=False)]
    result = {
        "run_dir": str(run_dir), "metric": run.meta.get("metric"), "target": target,
        "confidence": confidence,
        "operating_point": {"capacity": capacity_labels[ci],
                            "regularization": regularization_labels[ri], "size": size,
                            "capacity_index": ci, "regularization_index": ri,
                            "chosen": "given" if at is not None else "best measured"},
        "verdict": here.verdict, "verdict_reason": here.reason,
        "diagnosis": here.as_dict(),
        "thresholds": vars(thresholds).copy(),
        "noise_floor": floor.value if floor else None,
        "noise_floor_band": [floor.low, floor.high] if floor else None,
        "noise_floor_setting": labels(floor.capacity_index, floor.regularization_index) if floor else None,
        "noise_floor_at_capacity_edge": floor_at_edge,
        "noise_floor_evidence": floor.evidence if floor else None,
        "plateau": plateau.value if plateau else None,
        "plateau_band": [plateau.low, plateau.high] if plateau else None,
        "plateau_setting": (labels(plateau.capacity_index, plateau.regularization_index)
                            if plateau else None),
        "calibration": curves.calibration.as_dict() if curves.calibration is not None else None,
        "reachable": reachable, "binding_limit": limit, "binding_detail": limit_detail,
        "label_next_rows": next_rows,
        "plan_cost": found[0] if found else None, "plan": plan, "actions": actions,
        "costs": {"per_sample": costs.per_sample, "capacity_step": costs.capacity_step,
                  "regularization_step": costs.regularization_step,
                  "less_capacity_step": costs.less_capacity(),
                  "feature_groups": dict(costs.feature_groups),
                  "per_fit_second": costs.per_fit_second, "max_samples": costs.max_samples,
                  "size_ladder": ladder},
        "settings": [d.as_dict() for d in settings.values()],
        "skipped": {"failed_rows": int(len(failed)), "settings": skipped,
                    "unfitted": list(getattr(curves, "unfitted", []))},
    }
    result = _plain(result)
    result["headline"] = headline(result, run.meta.get("capacity_param") or "capacity",
                                  run.meta.get("regularization_param") or "regularization")
    return result


def headline(advice: dict, capacity_name: str, regularization_name: str) -> str:
    """One plain sentence first: what to do, what it costs, what error to expect."""
    op, target = advice["operating_point"], advice["target"]
    if not advice["reachable"]:
        limit = advice["binding_limit"]
        below = advice["noise_floor_band"] is not None and target < advice["noise_floor_band"][0]
        reason = {"noise floor": ("it lies below the data's noise floor; only new information "
                                  "(better features, cleaner labels) can help" if below else
                                  "it lies inside the band of the data's noise floor; more rows "
                                  "narrow that band"),
                  "max_samples": "it needs more rows than max_samples allows",
                  "forecast too uncertain": "the forecasts are too uncertain to plan on yet",
                  "model plateau": "every setting of this model levels off above it",
                  "capacity range": "no setting of the grid gets there"}.get(limit, limit)
        text = f"No plan reaches the target {target:g} at {advice['confidence']:.0%} confidence: {reason}"
        if advice.get("label_next_rows"):
            text += (f"; label about {_about(advice['label_next_rows'])} more rows and run again "
                     f"to narrow the forecast")
        return text + "."
    if not advice["plan"]:
        d = advice["diagnosis"]
        return (f"Nothing to do: {capacity_name} {op['capacity']}, {regularization_name} "
                f"{op['regularization']} at {op['size']:,} rows already meets the target "
                f"{target:g} (measured {_g(d['validation_error'])}).")
    end = advice["plan"][-1]["to"]
    moves = []
    if end["capacity"] != op["capacity"]:
        moves.append(f"{capacity_name} {end['capacity']}")
    if end["regularization"] != op["regularization"]:
        moves.append(f"{regularization_name} {end['regularization']}")
    words = f"Switch to {' and '.join(moves)}" if moves else ""
    if end["size"] > op["size"]:
        rows = f"label about {_about(end['size'] - op['size'])} more rows"
        words = f"{words} and {rows}" if words else rows[0].upper() + rows[1:]
    low, high = end["interval"]
    return (f"{words}: expected {_g(end['predicted_error'])} ({_g(low)}-{_g(high)}), "
            f"cost {_money(advice['plan_cost'])}.")


def _about(rows: int) -> str:
    """A row count rounded to two significant figures, for plain sentences."""
    if rows < 100:
        return f"{rows:,}"
    digits = len(str(int(rows))) - 2
    return f"{int(round(rows, -digits)):,}"


def _step_words(edge, capacity_labels, regularization_labels, meta: dict) -> str:
    """'more-data to 1,600', 'more-capacity to degree 3', 'more-regularization to alpha 10'."""
    s = edge.target
    if edge.action == "more-data":
        return f"more-data to {s.size:,}"
    if edge.action.endswith("capacity"):
        name = meta.get("capacity_param") or "capacity"
        return f"{edge.action} to {name} {capacity_labels[s.capacity_index]}"
    name = meta.get("regularization_param") or "regularisation"
    return f"{edge.action} to {name} {regularization_labels[s.regularization_index]}"


# --- text ------------------------------------------------------------------------------------------

def _g(value, digits: int = 3) -> str:
    """Three significant figures."""
    return "-" if value is None else sig(value, digits)


def _money(value) -> str:
    """A cost: whole numbers without decimals, others with two."""
    if value is None:
        return "-"
    return f"{value:,.0f}" if float(value).is_integer() else f"{value:,.2f}"


def _interval(pair) -> str:
    return "-" if not pair or pair[0] is None else f"[{_g(pair[0])}, {_g(pair[1])}]"


def _test_words(test: dict | None, what: str) -> str:
    if not test:
        return f"{what}: too few folds to test"
    return (f"{what} {_g(test['mean'])}, {test['confidence']:.0%} interval {_interval([test['low'], test['high']])}, "
            f"t={_g(test['t'], 3)} on {test['dof']} df, one-sided p={_g(test['p_value'], 2)} "
            f"(corrected variance factor {_g(test['factor'], 4)})")


def left_with_unlimited_data(left: float) -> str:
    """What the part of the excess left with unlimited data (asymptote minus target) means."""
    return ("bias + noise that more data cannot remove" if left > 0
            else "below zero: with enough data this setting alone could reach the target")


def mean_meets_but_interval_not(confidence: float) -> str:
    """Why a plan is offered although the verdict is fine."""
    return (f"The mean validation error meets the target, but its {confidence:.0%} interval "
            f"does not yet lie below it.")


def render_advice(advice: dict) -> str:
    """Terminal text for an `advise` result."""
    op, d = advice["operating_point"], advice["diagnosis"]
    lines = [
        advice["headline"],
        "",
        f"Advice for {advice['run_dir']}  ({advice['metric']}, target {advice['target']:g}, "
        f"{advice['confidence']:.0%} confidence)",
        f"Operating point: capacity {op['capacity']}, regularisation {op['regularization']}, "
        f"{op['size']:,} training rows ({op['chosen']})",
        "",
        f"Verdict: {advice['verdict'].upper()}",
        f"  because {advice['verdict_reason']}",
        f"  training error {_g(d['train_error'])}   validation error {_g(d['validation_error'])}   "
        f"over {d['units']} folds",
        f"  {_test_words(d['gap_test'], 'gap')}",
    ]
    if d["previous_size"] is not None:
        what = f"drop per doubling ({d['previous_size']:,} -> {d['size']:,})"
        lines.append(f"  {_test_words(d['drop_per_doubling'], what)}")
    if d["curve_drop_next_doubling"] is not None:
        lines.append(f"  fitted curve: drop over the next doubling {_g(d['curve_drop_next_doubling'])}, "
                     f"this setting's asymptote {_g(d['setting_asymptote'])} "
                     f"{_interval(d['setting_asymptote_band'])}")
    if advice["noise_floor"] is not None:
        lines.append(f"  noise floor {_g(advice['noise_floor'])} {_interval(advice['noise_floor_band'])}"
                     f" (from setting {advice['noise_floor_setting']}: "
                     f"{advice['noise_floor_evidence']})")
    else:
        lines.append(f"  noise floor unknown (no converged settings of different capacity agree, "
                     f"and none has its training error below its plateau); this model's "
                     f"lowest plateau {_g(advice['plateau'])} {_interval(advice['plateau_band'])}"
                     f" (setting {advice['plateau_setting']}) bounds it from above")
    if advice.get("calibration"):
        from gridplan.calibration import Calibration
        lines.append(f"  forecasts: {Calibration(**advice['calibration']).sentence()}")
    if advice["noise_floor_at_capacity_edge"]:
        lines.append("  (found at the grid's largest capacity and still falling with capacity: it may "
                     "include bias, so no noise-floor verdict is given)")
    if d["removable_by_data"] is not None:
        left = d["not_removable"]
        meaning = left_with_unlimited_data(left)
        lines.append(f"  excess over target {_g(d['validation_error'] - advice['target'])} = "
                     f"{_g(d['removable_by_data'])} {_interval(d['removable_band'])} more data can remove"
                     f" + {_g(left)} {_interval(d['not_removable_band'])} left with unlimited data "
                     f"(asymptote minus target; {meaning})")
    lines.append("")
    if advice["reachable"]:
        if not advice["plan"]:
            lines.append("Plan: nothing to do; the operating point already meets the target.")
        else:
            if advice["verdict"] == "fine":
                lines.append(mean_meets_but_interval_not(advice["confidence"]))
            lines.append(f"Cheapest plan (total cost {_money(advice['plan_cost'])}; a state meets the "
                         f"target when its whole {advice['confidence']:.0%} interval is at or below it):")
            for i, step in enumerate(advice["plan"], 1):
                to = step["to"]
                lines.append(f"  {i}. {step['action']:<20} -> {to['capacity']},{to['regularization']} "
                             f"at {to['size']:,}   cost {_money(step['cost'])}   cumulative "
                             f"{_money(step['cumulative_cost'])}   predicted error "
                             f"{_g(step['predicted_error'])} {_interval(to['interval'])}"
                             f"{' (measured)' if to['measured'] else ''}")
                if step.get("worse_on_the_way"):
                    lines.append(f"     the error rises on this step, from "
                                 f"{_g(step['from']['predicted_error'])}: it is the cheapest way "
                                 f"to the steps after it, which end at the target")
    else:
        lines.append(f"No plan reaches the target. Binding limit: {advice['binding_limit']}.")
        lines.append(f"  {advice['binding_detail']}")
    lines += ["", "Next actions, cheapest plan first:"]
    shown_data, other_sizes, tied = False, [], {}
    for item in advice["actions"]:
        if item["action"] == "more-data" and item["to"] is not None:
            if shown_data:
                other_sizes.append(f"{item['to']['size']:,}")
                continue
            shown_data = True
        if item["reachable"] and item["plan_cost"] in tied:
            tied[item["plan_cost"]].append(f"{item['action']} to {item['to']['capacity']},"
                                           f"{item['to']['regularization']}")
            continue
        if item["reachable"]:
            tied[item["plan_cost"]] = []
        if item["to"] is None:
            lines.append(f"  {item['action']:<20} not possible: {item['reason']}")
            continue
        to = item["to"]
        where = (f"to {to['size']:,} rows" if item["action"] == "more-data"
                 else f"to {to['capacity']},{to['regularization']}")
        head = (f"  {item['action']:<20} {where:<18} step {_money(item['step_cost'])}  "
                f"error {_g(item['predicted_error'])} {_interval(item['interval'])}")
        if item["reachable"]:
            tail = f"  plan {_money(item['plan_cost'])}" + (
                f" (then {', '.join(item['then'])})" if item["then"] else "")
        else:
            tail = f"  cannot reach: {item['reason']}"
        lines.append(head + tail)
    for cost, others in tied.items():
        if others:
            lines.append(f"  {'':<20} same plan cost {_money(cost)} also by: {'; '.join(others)}")
    if other_sizes:
        lines.append(f"  {'':<20} more data to other sizes, each with a dearer plan or none: "
                     f"{', '.join(other_sizes)} rows")
    skipped = advice["skipped"]
    if skipped["failed_rows"] or skipped["unfitted"]:
        lines += ["", f"Skipped: {skipped['failed_rows']} failed fold rows"]
        for s in skipped["settings"]:
            lines.append(f"  {s['capacity']},{s['regularization']}: {s['failed_rows']} failed "
                         f"({s['example']})")
        for u in skipped["unfitted"]:
            lines.append(f"  {u['capacity']},{u['regularization']}: no curve ({u['reason']})")
    return "\n".join(lines)
