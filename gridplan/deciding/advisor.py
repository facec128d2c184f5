"""Advice for a finished run: curves -> diagnosis -> plan, as a JSON-ready dict and as text.

`advise(run_dir, target=...)` reads the run only through the store
(`gridplan.measuring.runs.open_run`), fits the learning curves, diagnoses every setting
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

from gridplan.common.checks import DEFAULT_BOOT, check_confidence, check_target
from gridplan.common.errors import GridplanError
from gridplan.common.jsonable import plain as _plain
from gridplan.common.results import Advice
from gridplan.common.wording import money, number
from gridplan.deciding.calibration import OWN_CHECK_CAUTION
from gridplan.deciding.curves import CHECKED_HORIZON, DEFAULT_MAX_SIZE
from gridplan.deciding.diagnosis import (
    NoiseFloor,
    Plateau,
    Thresholds,
    best_plateau,
    corrected_t_test,
    diagnose_grid,
    diagnose_setting,
    estimate_noise_floor,
)
from gridplan.deciding.gridfit import GridCurves
from gridplan.deciding.planner import (
    CostModel,
    State,
    build_state_graph,
    cheapest_plan,
    costs_to_goal,
    rank_first_moves,
    size_ladder,
    state_error_forecasts,
)
from gridplan.measuring.config import Costs
from gridplan.measuring.runs import open_run

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
        raise GridplanError("no target error given: pass a target (--target) or set [goal] target in the config.")
    return check_target(target)


def _resolve_confidence(confidence, config) -> float:
    if confidence is None:
        confidence = config.confidence if config is not None else 0.9
    return check_confidence(confidence)


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
           per_fit_second: float | None = None, switch_model: float | None = None,
           thresholds: Thresholds | None = None, model: str | None = None,
           n_boot: int = DEFAULT_BOOT, seed: int = 0, curves: GridCurves | None = None) -> Advice:
    """Diagnose a run at the operating point and plan the cheapest way to the target.

    `at` is "CAPACITY,REG" (labels) of model `model` (default: the first
    model, or with several models the one whose best setting measures lowest);
    default setting: the one with the lowest mean validation error at the
    largest measured size. Costs and max_samples come from the run's config
    unless overridden here. With several model tables the noise floor draws
    on all of them and a plan may switch model (cost `switch_model`).
    `curves` may pass curves already fitted on this (single-model) run's cells.
    """
    run = open_run(run_dir, model=model)
    names = run.model_names
    options = dict(target=target, confidence=confidence, per_sample=per_sample,
                   capacity_step=capacity_step, regularization_step=regularization_step,
                   max_samples=max_samples, less_capacity_step=less_capacity_step,
                   per_fit_second=per_fit_second, thresholds=thresholds, n_boot=n_boot, seed=seed)
    if len(names) == 1:
        return Advice.from_dict(_with_models([_advise_model(run, at=at, curves=curves, **options)],
                                             0, None))
    from gridplan.deciding.curvestore import cached_curves
    from gridplan.deciding.floor import floor_across_models
    runs = [run.for_model(i) for i in range(len(names))]
    grids = [cached_curves(r.run_dir, r.cells(), n_boot=n_boot, seed=seed) for r in runs]
    confidence_value = _resolve_confidence(confidence, run.config)
    pooled = floor_across_models(grids, names, confidence_value)
    floor = None if pooled is None else NoiseFloor(
        pooled.value, pooled.low, pooled.high, pooled.capacity_index,
        pooled.regularization_index, pooled.informative, pooled.evidence)
    floor_where = None if pooled is None else (pooled.model_index, _setting_label(
        runs[pooled.model_index], pooled.capacity_index, pooled.regularization_index))
    # `at` names a setting of the operating model: the given one, else the best measured
    # (found with every model at its own best setting, then that model advised again at `at`)
    each = [_advise_model(r, at=at if model is not None and i == run.model else None,
                          curves=grids[i], floor=floor, floor_where=floor_where, **options)
            for i, r in enumerate(runs)]
    if model is not None:
        here = run.model
    else:
        here = min(range(len(each)), key=lambda i: (each[i]["diagnosis"]["validation_error"], i))
        if at is not None:
            each[here] = _advise_model(runs[here], at=at, curves=grids[here], floor=floor,
                                       floor_where=floor_where, **options)
    costs = _cost_model(run.config, {"switch_model": switch_model})
    return Advice.from_dict(_with_models(each, here, costs.switch_model))


def _setting_label(run, ci: int, ri: int) -> str:
    """'CAPACITY,REG' of a setting of `run`, by its axis labels."""
    capacity, regularization = run.axis_labels("capacity"), run.axis_labels("regularization")
    return f"{capacity[ci]},{regularization[ri]}"


_UNSET = object()


def _advise_model(run, *, target: float | None, at: str | None, confidence: float | None,
                  per_sample: float | None, capacity_step: float | None,
                  regularization_step: float | None, max_samples: int | None,
                  less_capacity_step: float | None, per_fit_second: float | None,
                  thresholds: Thresholds | None, n_boot: int, seed: int,
                  curves: GridCurves | None, floor=_UNSET, floor_where=None) -> dict:
    """One model table's advice: its operating point, diagnosis, plan and ranked moves.

    `floor` overrides the noise floor (the one pooled over every model of the
    run, None when unknown); `floor_where` is then (model index, setting label).
    """
    run_dir = run.run_dir
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
        raise GridplanError(f"{run_dir or 'the grid'} has no successful cells to advise on.")
    capacity_labels = run.axis_labels("capacity")
    regularization_labels = run.axis_labels("regularization")

    def labels(ci: int, ri: int) -> str:
        return f"{capacity_labels[ci]},{regularization_labels[ri]}"

    if curves is None:
        from gridplan.deciding.curvestore import cached_curves
        curves = cached_curves(run_dir, cells, n_boot=n_boot, seed=seed)
    test_sizes = run.meta.get("test_sizes") or []
    n_test = float(np.mean(test_sizes)) if test_sizes else float(
        run.meta.get("n_rows", 0)) / max(int(run.meta.get("folds", 5)), 1)
    floor = estimate_noise_floor(curves, confidence) if floor is _UNSET else floor
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
    floor_here = floor is not None and (floor_where is None or floor_where[0] == run.model)
    floor_at_edge = floor_here and _floor_at_capacity_edge(
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
        return {"model": run.model_name, "capacity": capacity_labels[state.capacity_index],
                "regularization": regularization_labels[state.regularization_index],
                "size": state.size, "predicted_error": f.point,
                "interval": [f.low, f.high], "error_at_confidence": f.predicted,
                "measured": f.measured}

    plan, end_check = [], None
    if found is not None:
        cumulative, current = 0.0, start
        for edge in found[1]:
            cumulative += edge.cost
            before, after = states.forecasts[current].point, states.forecasts[edge.target].point
            plan.append({"action": edge.action, "cost": edge.cost, "cumulative_cost": cumulative,
                         "predicted_error": after, "worse_on_the_way": bool(after > before),
                         "from": describe(current), "to": describe(edge.target)})
            current = edge.target
        end_fit = curves.get((current.capacity_index, current.regularization_index))
        if end_fit is not None and not states.forecasts[current].measured:
            end_check = end_fit.own_check_error

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
        "run_dir": "in memory" if run_dir is None else str(run_dir),
        "metric": run.meta.get("metric"), "target": target,
        "confidence": confidence,
        "operating_point": {"model": run.model_name, "capacity": capacity_labels[ci],
                            "regularization": regularization_labels[ri], "size": size,
                            "capacity_index": ci, "regularization_index": ri,
                            "chosen": "given" if at is not None else "best measured"},
        "verdict": here.verdict, "verdict_reason": here.reason,
        "diagnosis": here.as_dict(),
        "thresholds": vars(thresholds).copy(),
        "noise_floor": floor.value if floor else None,
        "noise_floor_band": [floor.low, floor.high] if floor else None,
        "noise_floor_setting": (None if not floor else labels(floor.capacity_index,
                                floor.regularization_index) if floor_where is None
                                else floor_where[1]),
        "noise_floor_model": (None if not floor else run.model_name if floor_where is None
                              else run.model_names[floor_where[0]]),
        "noise_floor_at_capacity_edge": floor_at_edge,
        "noise_floor_evidence": floor.evidence if floor else None,
        "plateau": plateau.value if plateau else None,
        "plateau_band": [plateau.low, plateau.high] if plateau else None,
        "plateau_setting": (labels(plateau.capacity_index, plateau.regularization_index)
                            if plateau else None),
        "plateau_model": run.model_name if plateau else None,
        "calibration": curves.calibration.as_dict() if curves.calibration is not None else None,
        "reachable": reachable, "binding_limit": limit, "binding_detail": limit_detail,
        "label_next_rows": next_rows, "horizon_size": int(CHECKED_HORIZON * size),
        "plan_end_check_error": end_check,
        "plan_cost": found[0] if found else None, "plan": plan, "actions": actions,
        "costs": {"per_sample": costs.per_sample, "capacity_step": costs.capacity_step,
                  "regularization_step": costs.regularization_step,
                  "less_capacity_step": costs.less_capacity(),
                  "feature_groups": dict(costs.feature_groups),
                  "per_fit_second": costs.per_fit_second, "max_samples": costs.max_samples,
                  "switch_model": costs.switch_model,
                  "size_ladder": ladder},
        "settings": [d.as_dict() for d in settings.values()],
        "skipped": {"failed_rows": int(len(failed)), "settings": skipped,
                    "unfitted": list(getattr(curves, "unfitted", []))},
    }
    result["operating_point"]["interval"] = describe(start)["interval"]
    result = _plain(result)
    result["_model_meta"] = {k: run.meta.get(k) for k in
                             ("family", "model", "capacity_param", "regularization_param")}
    return result


def _model_entry(advice: dict, meta: dict) -> dict:
    """What one model of a run offers: its best measured setting, plateau and own plan."""
    op, d = advice["operating_point"], advice["diagnosis"]
    return {"name": op["model"], "family": meta.get("family") or meta.get("model"),
            "capacity_param": meta.get("capacity_param") or "capacity",
            "regularization_param": meta.get("regularization_param") or "regularization",
            "best_setting": f"{op['capacity']},{op['regularization']}",
            "validation_error": d["validation_error"],
            "plateau": advice["plateau"], "plateau_band": advice["plateau_band"],
            "plateau_setting": advice["plateau_setting"],
            "reachable": advice["reachable"], "plan_cost": advice["plan_cost"],
            "binding_limit": advice["binding_limit"]}


def _with_models(each: list[dict], here: int, switch_cost: float | None) -> dict:
    """The advice at model `here`, with switching to another model as a move of its own.

    A switch lands on the other model's best measured setting at the same
    size, for `switch_cost`, and goes on with that model's own cheapest plan.
    The plan kept is the cheapest over staying and every switch (staying wins
    ties). One model: that model's advice with its entry under "models".
    """
    metas = [one.pop("_model_meta") for one in each]
    advice = dict(each[here])
    advice["models"] = [_model_entry(one, meta) for one, meta in zip(each, metas)]
    if len(each) > 1:
        plateaus = [(one["plateau_band"][1], i) for i, one in enumerate(each)
                    if one["plateau_band"] is not None]
        if plateaus:
            best = each[min(plateaus)[1]]
            advice.update(plateau=best["plateau"], plateau_band=best["plateau_band"],
                          plateau_setting=best["plateau_setting"],
                          plateau_model=best["plateau_model"])
        switches = []
        for i, other in enumerate(each):
            if i == here:
                continue
            dest = _measured_place(other)
            total = switch_cost + other["plan_cost"] if other["reachable"] else None
            then = [f"{s['action']} to {s['to']['capacity']},{s['to']['regularization']}"
                    + (f" at {s['to']['size']:,}" if s["action"] == "more-data" else "")
                    for s in other["plan"]]
            switches.append((total, i, other, dest, then))
        for total, i, other, dest, then in switches:
            advice["actions"].append({
                "action": "switch-model", "to": dest, "step_cost": switch_cost,
                "predicted_error": dest["predicted_error"], "interval": dest["interval"],
                "plan_cost": total, "reachable": total is not None,
                "reason": ("meets the target" if other["reachable"] and not other["plan"] else
                           "meets the target after further steps" if other["reachable"] else
                           f"no plan of model {dest['model']} reaches the target "
                           f"({other['binding_limit']})"),
                "then": then})
        advice["actions"].sort(key=lambda a: (0, a["plan_cost"]) if a["reachable"] else
                               (1, 0.0) if a["to"] is not None else (2, 0.0))
        best = min((s for s in switches if s[0] is not None), default=None,
                   key=lambda s: (s[0], s[1]))
        if best is not None and (not advice["reachable"] or best[0] < advice["plan_cost"]):
            total, i, other, dest, _ = best
            start = _measured_place(advice)
            plan = [{"action": "switch-model", "cost": switch_cost,
                     "cumulative_cost": switch_cost, "predicted_error": dest["predicted_error"],
                     "worse_on_the_way": bool(dest["predicted_error"] > start["predicted_error"]),
                     "from": start, "to": dest}]
            for step in other["plan"]:
                plan.append(dict(step, cumulative_cost=step["cumulative_cost"] + switch_cost))
            advice.update(plan=plan, plan_cost=total, reachable=True, binding_limit=None,
                          binding_detail=None, label_next_rows=None,
                          plan_end_check_error=other["plan_end_check_error"] if other["plan"]
                          else None)
    advice["headline"] = headline(advice)
    return advice


def _measured_place(advice: dict) -> dict:
    """The operating point as a plan state: its measured mean and corrected-t interval."""
    op = advice["operating_point"]
    low, high = op["interval"]
    return {"model": op["model"], "capacity": op["capacity"],
            "regularization": op["regularization"], "size": op["size"],
            "predicted_error": advice["diagnosis"]["validation_error"], "interval": [low, high],
            "error_at_confidence": high, "measured": True}


def headline(advice: dict) -> str:
    """One plain sentence first: what to do, what it costs, what error to expect."""
    op, target = advice["operating_point"], advice["target"]
    models = {m["name"]: m for m in advice.get("models") or []}
    several = len(models) > 1

    def params(model: str | None) -> tuple[str, str]:
        entry = models.get(model) or {}
        return (entry.get("capacity_param") or "capacity",
                entry.get("regularization_param") or "regularization")

    if not advice["reachable"]:
        limit = advice["binding_limit"]
        below = advice["noise_floor_band"] is not None and target < advice["noise_floor_band"][0]
        every = "every setting of every model" if several else "every setting of this model"
        reason = {"noise floor": ("it lies below the data's noise floor; only new information "
                                  "(better features, cleaner labels) can help" if below else
                                  "it lies inside the band of the data's noise floor; more rows "
                                  "narrow that band"),
                  "max_samples": "it needs more rows than max_samples allows",
                  "forecast too uncertain": "the forecasts are too uncertain to plan on yet",
                  "model plateau": f"{every} levels off above it",
                  "capacity range": "no setting of the grid gets there"}.get(limit, limit)
        text = f"No plan reaches the target {target:g} at {advice['confidence']:.0%} confidence: {reason}"
        if advice.get("label_next_rows"):
            text += (f"; label about {_about(advice['label_next_rows'])} more rows and run again "
                     f"to narrow the forecast")
        return text + "."
    capacity_name, regularization_name = params(op.get("model"))
    in_model = f"model {op.get('model')} with " if several else ""
    if not advice["plan"]:
        d = advice["diagnosis"]
        return (f"Nothing to do: {in_model}{capacity_name} {op['capacity']}, {regularization_name} "
                f"{op['regularization']} at {op['size']:,} rows already meets the target "
                f"{target:g} (measured {number(d['validation_error'])}).")
    end = advice["plan"][-1]["to"]
    moves = []
    if end.get("model") != op.get("model"):
        capacity_name, regularization_name = params(end.get("model"))
        moves.append(f"model {end['model']} with {capacity_name} {end['capacity']}, "
                     f"{regularization_name} {end['regularization']}")
    else:
        if end["capacity"] != op["capacity"]:
            moves.append(f"{capacity_name} {end['capacity']}")
        if end["regularization"] != op["regularization"]:
            moves.append(f"{regularization_name} {end['regularization']}")
    words = f"Switch to {' and '.join(moves)}" if moves else ""
    if end["size"] > op["size"]:
        rows = f"label about {_about(end['size'] - op['size'])} more rows"
        words = f"{words} and {rows}" if words else rows[0].upper() + rows[1:]
    low, high = end["interval"]
    text = (f"{words}: expected {number(end['predicted_error'])} ({number(low)}-{number(high)}), "
            f"cost {money(advice['plan_cost'])}")
    rough = advice.get("plan_end_check_error")
    if rough is not None and rough > OWN_CHECK_CAUTION:
        text += (f"; a rough forecast: refitted on its smaller sizes, this setting's curve "
                 f"forecast its larger ones {rough:.0%} off")
    horizon = advice["horizon_size"]
    if end["size"] > horizon:
        largest = horizon / CHECKED_HORIZON
        text += (f"; but {end['size']:,} rows are {end['size'] / largest:.0f}x the largest "
                 f"measured size and forecasts are checked only to {CHECKED_HORIZON:g}x, so label "
                 f"at most about {_about(horizon - op['size'])} more rows first and run again")
    return text + "."


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
