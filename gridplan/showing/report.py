"""One self-contained HTML report of a run: the job, the verdict, the plan, the pictures.

`write_report(run_dir)` fits the learning curves once, asks the advisor for a
verdict and a plan (when a target error is known), draws the heatmaps and
curves with `gridplan.showing.figures`, and writes one HTML file with every image
embedded as a PNG data URI. The file needs no network and no JavaScript, and
prints cleanly. Every string that comes from the data, the config or the run
folder is escaped with `html.escape`.

A backtest result (the dict of `gridplan.backtest.backtest`) is shown when the
run folder holds it as JSON in `backtest.json`.
"""

from __future__ import annotations

import math
import os
from pathlib import Path
from typing import TYPE_CHECKING, Any, Mapping, Sequence

import numpy as np
import pandas as pd

from gridplan.common.checks import DEFAULT_BOOT
from gridplan.common.errors import GridplanError
from gridplan.common.files import replaced
from gridplan.common.metrics import METRIC_LABELS, metric_label
from gridplan.common.wording import money, plural, sig
from gridplan.showing.gather import BACKTEST_FILE, ReportInputs, gather_inputs
from gridplan.showing.markup import (
    Markup,
    drawn,
    esc,
    facts,
    join,
    page_style,
    para,
    render_page,
    section,
    table,
    with_figures,
)
from gridplan.showing.text import (
    fold_test_words,
    left_with_unlimited_data,
    mean_meets_but_interval_not,
    own_check_words,
)

if TYPE_CHECKING:  # pragma: no cover - typing only
    from matplotlib.figure import Figure

    from gridplan.measuring.runs import Run

REPORT_NAME = "report.html"

VERDICT_WORDS = {
    "fine": "meets the target",
    "high-bias": "held back by bias",
    "high-variance": "held back by variance",
    "both": "bias and variance both matter",
    "noise-floor": "close to the noise floor",
}


# --- number words -------------------------------------------------------------------------------

def _given(value: Any) -> str:
    """A number the user gave (a target), as they wrote it."""
    return "–" if value is None else f"{value:g}"


def _num(value: Any, digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    return sig(value, digits) if isinstance(value, (int, float)) else f"{value:.{digits}g}"


def _money(value: Any) -> str:
    return money(value, missing="–")


def _count(value: Any) -> str:
    return "–" if value is None else f"{int(value):,}"


def _band(pair: Sequence[Any] | None, digits: int = 3) -> str:
    if not pair or pair[0] is None or pair[1] is None:
        return ""
    return f"[{_num(pair[0], digits)}, {_num(pair[1], digits)}]"


def _with_band(value: Any, pair: Sequence[Any] | None) -> str:
    band = _band(pair)
    return f"{_num(value)} {band}".strip()


def _level(value: Any, scale: float) -> Any:
    """An error level with round-off dust (below 1e-6 x the scale of the errors) shown as 0."""
    if value is None or not math.isfinite(scale) or abs(value) >= 1e-6 * abs(scale):
        return value
    return 0.0


def _level_band(value: Any, pair: Sequence[Any] | None, scale: float) -> str:
    """A level and its band, each with round-off dust shown as 0."""
    pair = None if pair is None else [_level(v, scale) for v in pair]
    return _with_band(_level(value, scale), pair)


def _data_value(value: Any) -> str | None:
    """A machine-readable copy of a number for a data-value attribute."""
    if value is None:
        return None
    return repr(float(value)) if isinstance(value, (int, float)) else str(value)


# --- reading the run ------------------------------------------------------------------------------

def _metric_words(run: "Run") -> str:
    metric = run.meta.get("metric") or "error"
    label = METRIC_LABELS.get(metric)
    if label:
        return f"{label} ({metric})"
    return f"{metric_label(metric)} (the scikit-learn scorer {metric} as an error, lower is better)"


def _run_name(run: "Run") -> str:
    if run.config is not None:
        return run.config.name
    return "grid in memory" if run.run_dir is None else Path(run.run_dir).resolve().name


def _best_measured(cells: pd.DataFrame) -> tuple[int, int]:
    """The setting with the lowest mean validation error at the largest measured size."""
    ok = cells[cells["status"] == "ok"]
    at_size = ok[ok["train_size"] == ok["train_size"].max()]
    means = at_size.groupby(["capacity_index", "regularization_index"])["validation_error"].mean()
    ci, ri = means.idxmin()
    return int(ci), int(ri)


def _operating_key(inputs: ReportInputs) -> tuple[int, int]:
    if inputs.advice is not None:
        op = inputs.advice["operating_point"]
        return int(op["capacity_index"]), int(op["regularization_index"])
    return _best_measured(inputs.cells)


def _setting_words(run: "Run", capacity: Any, regularization: Any) -> str:
    cap = run.meta.get("capacity_param") or "capacity"
    reg = run.meta.get("regularization_param") or "regularisation"
    if len(run.axis_labels("regularization")) <= 1:
        return f"{cap} {capacity}"
    return f"{cap} {capacity}, {reg} {regularization}"


# --- sections --------------------------------------------------------------------------------------

def _masthead(inputs: ReportInputs) -> Markup:
    run, meta = inputs.run, inputs.run.meta
    data_name = Path(str(meta.get("data_path", "?"))).name
    line = (f"{meta.get('model', '?')} predicting {meta.get('target_column', '?')} "
            f"from {data_name} · {_metric_words(run)} · written "
            f"{inputs.written.strftime('%Y-%m-%d %H:%M')} UTC")
    return Markup(f"<header class=\"masthead\"><p class=\"kicker\">gridplan · grid report</p>"
                  f"<h1>{esc(_run_name(run))}</h1><p class=\"byline\">{esc(line)}</p></header>")


def _tile(label: str, value: str, detail: str, key: str, number: Any = None,
          css: str = "") -> Markup:
    return Markup(f"<div class=\"tile {esc(css)}\" id=\"tile-{esc(key)}\">"
                  f"<div class=\"tile-label\">{esc(label)}</div>"
                  f"<div class=\"tile-value\"{_value_attr(number)}>{esc(value)}</div>"
                  f"<div class=\"tile-detail\">{esc(detail)}</div></div>")


def _value_attr(number: Any) -> str:
    value = _data_value(number)
    return "" if value is None else f" data-value=\"{esc(value)}\""


def _at_a_glance(inputs: ReportInputs) -> Markup:
    a, run = inputs.advice, inputs.run
    tiles = []
    if a is not None:
        d = a["diagnosis"]
        tiles.append(_tile("Verdict", a["verdict"], VERDICT_WORDS.get(a["verdict"], ""), "verdict",
                           a["verdict"], css=f"verdict-{a['verdict']}"))
        tiles.append(_tile("Validation error today", _num(d["validation_error"]),
                           f"target {_given(a['target'])}, at "
                           f"{_setting_words(run, d['capacity'], d['regularization'])}, "
                           f"{_count(d['size'])} rows", "error", d["validation_error"]))
        if a["reachable"]:
            plan_detail = ("the operating point already meets the target" if not a["plan"] else
                           f"{plural(len(a['plan']), 'step')} to the target")
            tiles.append(_tile("Cheapest plan", _money(a["plan_cost"]), plan_detail, "plan-cost",
                               a["plan_cost"]))
        else:
            tiles.append(_tile("Cheapest plan", "out of reach",
                               f"binding limit: {a['binding_limit']}", "plan-cost", css="unreachable"))
        scale = abs(d["validation_error"] or 1.0)
        band = a["noise_floor_band"]
        if a["noise_floor"] is not None:
            tiles.append(_tile("Noise floor", _num(_level(a["noise_floor"], scale)),
                               _band([_level(v, scale) for v in band]) or "", "floor",
                               a["noise_floor"]))
        else:
            plateau = a.get("plateau_band")
            tiles.append(_tile("Noise floor", "unknown",
                               f"this model's lowest plateau {_num(a['plateau'])} "
                               f"{_band(plateau) or ''}".strip() if a.get("plateau") is not None
                               else "no estimate", "floor", None))
    else:
        ci, ri = _best_measured(inputs.cells)
        ok = inputs.cells[inputs.cells["status"] == "ok"]
        rows = ok[(ok.capacity_index == ci) & (ok.regularization_index == ri)]
        size = int(rows["train_size"].max())
        value = float(rows[rows["train_size"] == size]["validation_error"].mean())
        why = "no target error is set" if inputs.target is None else "the advisor could not judge"
        tiles.append(_tile("Verdict", "none", why, "verdict"))
        where = _setting_words(run, run.axis_labels("capacity")[ci], run.axis_labels("regularization")[ri])
        tiles.append(_tile("Best validation error", _num(value), f"at {where}, {_count(size)} rows",
                           "error", value))
        tiles.append(_tile("Cheapest plan", "not planned", why, "plan-cost"))
    body = ([Markup(f"<p class=\"headline\" id=\"headline\">{esc(a['headline'])}</p>")]
            if a is not None else [])
    body.append(Markup(f"<div class=\"tiles\">{join(tiles)}</div>"))
    if a is not None:
        body.append(para(f"In short: {a['verdict_reason']}.", "lead"))
    else:
        body.append(para(f"No plan in this report: {inputs.advice_note}", "note"))
    return Markup(f"<section id=\"glance\" class=\"glance\">{join(body)}</section>")


def _costs_words(inputs: ReportInputs) -> list[tuple[str, str]]:
    if inputs.advice is not None:
        c = inputs.advice["costs"]
        values = dict(per_sample=c["per_sample"], capacity_step=c["capacity_step"],
                      less_capacity_step=c["less_capacity_step"],
                      regularization_step=c["regularization_step"],
                      per_fit_second=c["per_fit_second"], max_samples=c["max_samples"],
                      feature_groups=c["feature_groups"])
    elif inputs.run.config is not None:
        c = inputs.run.config.costs
        values = dict(per_sample=c.per_sample, capacity_step=c.capacity_step, less_capacity_step=None,
                      regularization_step=c.regularization_step, per_fit_second=c.per_fit_second,
                      max_samples=c.max_samples, feature_groups=c.feature_groups)
    else:
        return [("Costs", "not known (the run folder has no readable config copy)")]
    rows = [("Cost of one more labelled row", _money(values["per_sample"])),
            ("Cost of one capacity step up", _money(values["capacity_step"]))]
    if values["less_capacity_step"] is not None:
        rows.append(("Cost of one capacity step down", _money(values["less_capacity_step"])))
    rows += [("Cost of one regularisation step", _money(values["regularization_step"])),
             ("Compute cost per second of fitting", _money(values["per_fit_second"])),
             ("Most rows that can ever be had",
              "no limit set" if values["max_samples"] is None else _count(values["max_samples"]))]
    if inputs.advice is not None and len(inputs.advice.get("models") or []) > 1:
        rows.append(("Cost of switching to another model", _money(c["switch_model"])))
    if values["feature_groups"]:
        rows.append(("Cost per added feature group", "; ".join(
            f"{k}: {_money(v)}" for k, v in values["feature_groups"].items())))
    return rows


def _job_section(inputs: ReportInputs, number: int) -> Markup:
    run, meta, config, cells = inputs.run, inputs.run.meta, inputs.run.config, inputs.cells
    identity = meta.get("identity") or {}
    features = (identity.get("data") or {}).get("features") or (
        list(config.features) if config is not None and config.features else None)
    model = str(meta.get("model", "?"))
    if len(run.model_names) > 1:
        model = f"{run.model_name}: {model} (the operating point's; every model under Models compared)"
    params = config.params if config is not None else {}
    if params:
        model += " with " + ", ".join(f"{k} = {v}" for k, v in params.items())
    cap_param = meta.get("capacity_param") or "capacity"
    reg_param = meta.get("regularization_param") or "regularisation"
    test_sizes = meta.get("test_sizes") or []
    resampling = f"{meta.get('folds', '?')}-fold cross-validation x {plural(int(meta.get('repeats', 1)), 'repeat')}"
    if config is not None:
        resampling += f", seed {config.seed}"
    if test_sizes:
        resampling += f"; validation folds of {min(test_sizes):,}–{max(test_sizes):,} rows" \
            if min(test_sizes) != max(test_sizes) else f"; validation folds of {test_sizes[0]:,} rows"
    ok = int((cells["status"] == "ok").sum())
    paths = cells.loc[cells["status"] == "ok", "path"].value_counts()
    fits = f"{len(cells):,} fold fits stored: {ok:,} finished, {len(cells) - ok:,} failed"
    if len(paths):
        fits += " (" + ", ".join(f"{p}: {n:,}" for p, n in paths.items()) + ")"
    pairs = [
        ("Run folder", str(run.run_dir or "none: the grid is kept in memory")),
        ("Config file", meta.get("config_name", "?")),
        ("Data file", f"{meta.get('data_path', '?')} ({_count(meta.get('n_rows'))} rows)"),
        ("Target column", meta.get("target_column", "?")),
        ("Task", meta.get("task", "?")),
        ("Feature columns", ", ".join(map(str, features)) if features else "all but the target"),
        ("Model", model),
        (f"Capacity axis ({cap_param})", ", ".join(run.axis_labels("capacity"))),
        (f"Regularisation axis ({reg_param})", ", ".join(run.axis_labels("regularization")) or "none"),
        ("Training sizes (rows)", ", ".join(f"{int(s):,}" for s in meta.get("sizes", []))),
        ("Resampling", resampling),
        ("Metric", _metric_words(run)),
        ("Target error", "not set" if inputs.target is None else _given(inputs.target)),
        ("Confidence for bands and plans", f"{inputs.confidence:.0%}"),
        ("Fits", fits),
    ]
    pairs += _costs_words(inputs)
    return section("job", number, "The job", [
        para("What was measured, on what, and what it costs to change. Costs are in your own units."),
        facts(pairs)])


def _diagnosis_section(inputs: ReportInputs, number: int) -> Markup:
    a = inputs.advice
    if a is None:
        return section("diagnosis", number, "Diagnosis", [
            para(f"No diagnosis against a target: {inputs.advice_note}", "note"),
            para("The maps, curves and per-setting table below still show every measured number.")])
    d, op, run = a["diagnosis"], a["operating_point"], inputs.run
    badge = Markup(f"<p class=\"verdict verdict-{esc(a['verdict'])}\"><span class=\"badge\" "
                   f"id=\"verdict\" data-value=\"{esc(a['verdict'])}\">{esc(a['verdict'])}</span> "
                   f"<span class=\"because\">because {esc(a['verdict_reason'])}</span></p>")
    rows = [
        ("Operating point", f"{_setting_words(run, op['capacity'], op['regularization'])}, "
                            f"{_count(op['size'])} training rows ({op['chosen']})"),
        ("Training error", f"{_num(d['train_error'])} (mean over {d['units']} folds)"),
        ("Validation error", f"{_num(d['validation_error'])} (target {_given(a['target'])})"),
        ("Gap (validation minus training)", fold_test_words(d["gap_test"])),
    ]
    if d.get("previous_size") is not None:
        rows.append((f"Drop per doubling ({_count(d['previous_size'])} → {_count(d['size'])} rows)",
                     fold_test_words(d["drop_per_doubling"])))
    if d.get("curve_drop_next_doubling") is not None:
        rows.append(("Fitted curve: drop over the next doubling", _num(d["curve_drop_next_doubling"])))
        rows.append(("This setting's asymptote", _level_band(
            d["setting_asymptote"], d["setting_asymptote_band"], abs(d["validation_error"] or 1.0))))
        if d.get("own_check_error") is not None:
            rows.append(("Its own extrapolation check", own_check_words(d["own_check_error"])))
    scale = abs(d["validation_error"] or 1.0)
    several = len(a.get("models") or []) > 1
    if a["noise_floor"] is not None:
        floor = _level_band(a["noise_floor"], a["noise_floor_band"], scale)
        where = (f"model {a['noise_floor_model']}, setting" if several else "setting")
        floor += f" (at {where} {a['noise_floor_setting']}: {a['noise_floor_evidence']})"
        rows.append(("Noise floor", floor))
    else:
        kinds = "capacity or model" if several else "capacity"
        rows.append(("Noise floor", f"unknown: no converged settings of different {kinds} agree, "
                                    "and none has its training error below its plateau"))
        if a.get("plateau") is not None:
            where = (f"model {a['plateau_model']}, setting" if several else "setting")
            rows.append(("Lowest plateau of any model (an upper bound on the floor)" if several
                         else "This model's lowest plateau (an upper bound on the floor)",
                         _level_band(a["plateau"], a["plateau_band"], scale)
                         + f" (at {where} {a['plateau_setting']})"))
    if a.get("calibration"):
        from gridplan.deciding.calibration import Calibration
        rows.append(("Forecasts beyond the data", Calibration(**a["calibration"]).sentence()))
    if d.get("bias_share") is not None:
        rows.append(("Share of the excess error", f"bias {d['bias_share']:.0%}, "
                                                  f"variance {d['variance_share']:.0%}"))
    if d.get("removable_by_data") is not None:
        rows.append(("Excess over the target", _num(d["validation_error"] - a["target"])))
        rows.append(("… of which more data can remove",
                     _with_band(d["removable_by_data"], d["removable_band"])))
        rows.append(("… left with unlimited data (asymptote minus target)",
                     _with_band(d["not_removable"], d["not_removable_band"])
                     + "; " + left_with_unlimited_data(d["not_removable"])))
    body = [badge, facts(rows)]
    if a.get("noise_floor_at_capacity_edge"):
        body.append(para("The lowest asymptote lies at the grid's largest capacity and is still falling "
                       "with capacity, so it may include bias; no noise-floor verdict is given.", "note"))
    t = a.get("thresholds") or {}
    if t:
        body.append(para(f"How the verdict is reached: the gap counts as real when its one-sided "
                       f"p-value is below {_num(t.get('alpha'))}; bias or variance is named when it "
                       f"explains at least {_num(t.get('min_share'))} of the excess error; 'near the "
                       f"noise floor' means a validation error within {_num(t.get('floor_margin'))} x "
                       f"the floor above it; a curve is flat when it drops less than "
                       f"{_num(t.get('flat_fraction'))} x the target per doubling. Folds share "
                       f"training rows, so the intervals use the corrected resampled t-test.",
                       "small"))
    return section("diagnosis", number, "Where you stand", body)


def _to_words(run: "Run", to: Mapping) -> str:
    """A plan state in words; one in another model of the run names that model and its parameters."""
    model = to.get("model")
    if model is not None and model != run.model_name:
        other = run.for_model(model)
        return f"model {model}: {_setting_words(other, to['capacity'], to['regularization'])}"
    return _setting_words(run, to["capacity"], to["regularization"])


def _models_section(inputs: ReportInputs, number: int) -> Markup:
    """Several model tables: what each offers at its best measured setting."""
    a = inputs.advice
    rows = []
    for m in a["models"]:
        own = ("none needed: meets the target" if m["reachable"] and not m["plan_cost"] else
               f"{_money(m['plan_cost'])}" if m["reachable"] else f"none ({m['binding_limit']})")
        rows.append([m["name"], m["family"] or "", f"{m['capacity_param']} / "
                     f"{m['regularization_param']}", m["best_setting"],
                     _num(m["validation_error"]),
                     "–" if m["plateau"] is None else _with_band(m["plateau"], m["plateau_band"]),
                     own])
    floor = ("The noise floor draws on every model: " + (
        f"{_num(a['noise_floor'])} {_band(a['noise_floor_band'])}, {a['noise_floor_evidence']}."
        if a["noise_floor"] is not None else
        "unknown; the lowest plateau of any model bounds it from above."))
    return section("models", number, "Models compared", [
        para(f"Each model at its best measured setting at the largest size. A plan may switch model "
           f"for {_money(a['costs'].get('switch_model'))} and go on with that model's own cheapest "
           f"plan; the pictures below show model {inputs.run.model_name}, where the operating "
           f"point is."),
        table(["model", "kind", "capacity / regularisation", "best setting", "validation error",
                "plateau [band]", "own plan from there"], rows, css="numbers"),
        para(floor)])


def _plan_section(inputs: ReportInputs, number: int) -> Markup:
    a, run = inputs.advice, inputs.run
    if a is None:
        return section("plan", number, "The plan", [
            para(f"There is no plan in this report: {inputs.advice_note}", "note"),
            para("Set [goal] target in the config, or pass a target when writing the report, to get one.")])
    if not a["reachable"]:
        return section("plan", number, "The plan", [
            Markup(f"<p class=\"unreachable\" id=\"plan-total\">No plan reaches the target "
                   f"{esc(_given(a['target']))}. Binding limit: <strong>{esc(a['binding_limit'])}"
                   f"</strong>.</p>"),
            para(a["binding_detail"])])
    if not a["plan"]:
        return section("plan", number, "The plan", [
            Markup(f"<p id=\"plan-total\" data-value=\"{esc(_data_value(a['plan_cost']))}\">Nothing "
                   f"to do: the operating point already meets the target {esc(_given(a['target']))} "
                   f"(plan cost {esc(_money(a['plan_cost']))}).</p>"),
            para("The ranked moves below show what each change would cost and do.")])
    unsure = ([para(mean_meets_but_interval_not(a["confidence"]) + " The plan makes it do so.", "note")]
              if a.get("verdict") == "fine" else [])
    rows = []
    for n, step in enumerate(a["plan"], 1):
        to = step["to"]
        rows.append([n, step["action"], _to_words(run, step["from"]) + f", {_count(step['from']['size'])} rows",
                     _to_words(run, to) + f", {_count(to['size'])} rows", _money(step["cost"]),
                     _money(step["cumulative_cost"]), _with_band(step["predicted_error"], to["interval"]),
                     "measured" if to["measured"] else "forecast"])
    total = Markup(f"<p id=\"plan-total\" data-value=\"{esc(_data_value(a['plan_cost']))}\">Cheapest way "
                   f"to the target {esc(_given(a['target']))}: <strong>{esc(plural(len(a['plan']), 'step'))}, total "
                   f"cost {esc(_money(a['plan_cost']))}</strong>.</p>")
    return section("plan", number, "The plan", [
        total, *unsure,
        table(["#", "action", "from", "to", "step cost", "cumulative", "error after the step",
                "source"], rows, css="numbers plan"),
        para(f"Errors after a step are best estimates with their {a['confidence']:.0%} interval: the mean "
           f"over folds and its corrected t interval where the size was measured, the curve forecast "
           f"and its band beyond. A state meets the target when its whole interval is at or below it.",
           "small")])


def _actions_section(inputs: ReportInputs, number: int) -> Markup:
    a, run = inputs.advice, inputs.run
    if a is None:
        return Markup("")
    rows, classes = [], []
    for rank, item in enumerate(a["actions"], 1):
        if item["to"] is None:
            rows.append([rank, item["action"], "–", "–", "–", "–", f"not possible: {item['reason']}"])
            classes.append("muted")
            continue
        to = item["to"]
        where = (f"{_count(to['size'])} rows" if item["action"] == "more-data"
                 else _to_words(run, to))
        if item["reachable"]:
            outcome = "reaches the target" + (f", then {', '.join(item['then'])}" if item["then"] else "")
        else:
            outcome = f"cannot reach: {item['reason']}"
        rows.append([rank, item["action"], where, _money(item["step_cost"]),
                     _with_band(item["predicted_error"], item["interval"]),
                     _money(item["plan_cost"]), outcome])
        classes.append(None if item["reachable"] else "muted")
    return section("actions", number, "Next moves, ranked", [
        para("Every first move from the operating point, cheapest full plan first. 'Plan total' is the "
           "cost of that move plus the cheapest way on from there."),
        table(["rank", "move", "to", "step cost", "error after the move [band]", "plan total",
                "outcome"], rows, css="numbers actions", row_classes=classes)])


def _maps_section(inputs: ReportInputs, number: int) -> Markup:
    from gridplan.showing import figures
    run, a, target = inputs.run, inputs.advice, inputs.target
    drawn_on = "; the operating point and the plan are drawn on top" if a is not None else ""
    body = [para("Each cell is one capacity and training size, at the regularisation with the lowest "
               "validation error (named under the value). Darker is lower. Cells outlined in white "
               "meet the target." if target is not None else
               "Each cell is one capacity and training size, at the regularisation with the lowest "
               "validation error (named under the value). Darker is lower.")]
    body.append(drawn(lambda: figures.heatmap_figure(run, show="validation", axis="capacity",
                                                    advice=a, target=target),
                       "Heatmap of validation error by capacity and training rows",
                       f"Validation error by capacity and training rows{drawn_on}."))
    body.append(drawn(lambda: figures.heatmap_figure(run, show="gap", axis="capacity", advice=a,
                                                    target=target),
                       "Heatmap of the gap between validation and training error",
                       "Gap between validation and training error: a large gap that shrinks with "
                       "more rows points to variance; a small gap with a high error points to bias."))
    if len(run.axis_labels("regularization")) > 1:
        ci, _ = _operating_key(inputs)
        capacity = run.axis_labels("capacity")[ci]
        body.append(drawn(lambda: figures.heatmap_figure(run, show="validation", axis="regularization",
                                                        capacity=capacity, advice=a, target=target),
                           "Heatmap of validation error by regularisation at the operating capacity",
                           f"Validation error by regularisation and training rows at the operating "
                           f"point's capacity ({capacity})."))
    return section("maps", number, "Grid maps", body)


def _curves_section(inputs: ReportInputs, number: int) -> Markup:
    from gridplan.showing import figures
    run, fits = inputs.run, inputs.fits
    key = _operating_key(inputs)
    where = _setting_words(run, run.axis_labels("capacity")[key[0]], run.axis_labels("regularization")[key[1]])
    body = [para(f"Solid lines are measured means with the fold range shaded; the dashed line is the "
               f"fitted curve carried beyond the data with its {inputs.confidence:.0%} band (hatched). "
               f"The dotted line is that setting's plateau (its asymptote: noise plus its own bias), the dash-dot line the target.")]
    body.append(drawn(lambda: figures.curve_figure(run, fits, key, target=inputs.target,
                                                  confidence=inputs.confidence),
                       f"Learning curves at {where}",
                       f"Learning curves at the operating point ({where})."))
    body.append(drawn(lambda: figures.small_multiples_figure(run, fits, target=inputs.target,
                                                            confidence=inputs.confidence),
                       "Learning curves for several settings",
                       "Learning curves across the capacity axis, each at its best regularisation."))
    return section("curves", number, "Learning curves", body)


def _needed_words(s: Mapping) -> str:
    if s.get("reachable") is None:
        return "–"
    if not s["reachable"]:
        return Markup(f"not reachable <span class=\"why\">({esc(s.get('reason', ''))})</span>")
    horizon = s["horizon_size"]
    if s["samples_needed"] > horizon:
        times = horizon / s["largest_size"]
        return Markup(f"beyond {esc(_count(horizon))} <span class=\"why\">({times:g}x the data, "
                      f"as far as forecasts are checked)</span>")
    needed = _count(s["samples_needed"])
    low, high = s.get("samples_needed_low"), s.get("samples_needed_high")
    band = f" [{_count(low)}, {'more' if high is None else _count(high)}]" if low is not None else ""
    return needed + band


def _settings_section(inputs: ReportInputs, number: int) -> Markup:
    run, cells = inputs.run, inputs.cells
    ok = cells[cells["status"] == "ok"]
    verdicts = {(s["capacity_index"], s["regularization_index"]): s["verdict"]
                for s in (inputs.advice or {}).get("settings", [])}
    curves = {(s["capacity_index"], s["regularization_index"]): s for s in inputs.summary["settings"]}
    lines = []
    for (ci, ri), rows in ok.groupby(["capacity_index", "regularization_index"]):
        largest = rows[rows["train_size"] == rows["train_size"].max()]
        lines.append(((int(ci), int(ri)), int(largest["train_size"].iloc[0]),
                      float(largest["train_error"].mean()), float(largest["validation_error"].mean())))
    lines.sort(key=lambda line: (line[3], line[0]))
    here = _operating_key(inputs)
    capacity, regularization = run.axis_labels("capacity"), run.axis_labels("regularization")
    scale = float(ok["validation_error"].abs().max())
    table_rows, classes = [], []
    for key, size, train, validation in lines:
        s = curves.get(key)
        forecast = "no curve" if s is None else (
            "band too wide" if s["band_too_wide"] else
            _level_band(s["predicted_2x"], [s["predicted_2x_low"], s["predicted_2x_high"]], scale))
        table_rows.append([capacity[key[0]], regularization[key[1]], _count(size), _num(train),
                           _num(validation), _num(validation - train), verdicts.get(key, "–"),
                           "–" if s is None else s["family"],
                           "–" if s is None else
                           f"≥ {_num(s['asymptote'])} (the shared floor's lower edge)"
                           if s["plateau_at_floor"] else _level_band(
                               s["asymptote"], [s["asymptote_low"], s["asymptote_high"]], scale),
                           forecast, "–" if s is None else _needed_words(s)])
        classes.append("here" if key == here else None)
    headers = ["capacity", "regularisation", "rows", "training", "validation", "gap", "verdict",
               "curve", "floor [band]", "at 2x rows [band]", "rows for the target [band]"]
    keep = [n for n, header in enumerate(headers)
            if not (header == "verdict" and inputs.advice is None)
            and not (header.startswith("rows for the target") and inputs.target is None)]
    words = (f"Measured at each setting's largest size, sorted by validation error; the operating "
             f"point is highlighted. Forecasts are at twice the measured rows with a "
             f"{inputs.confidence:.0%} band.")
    if inputs.target is not None:
        words += " 'Rows for the target' is the size where the band's upper edge reaches the target."
    return section("settings", number, "Every setting", [
        para(words),
        table([headers[n] for n in keep], [[row[n] for n in keep] for row in table_rows],
               css="numbers settings", row_classes=classes,
               keep_whole=[i for i, n in enumerate(keep) if 2 <= n <= 7])])


def _blank_figure(width: float, height: float) -> "Figure":
    """A Figure on the non-interactive Agg canvas, kept out of pyplot's global list."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    figure = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(figure)
    return figure


def backtest_figure(result: Mapping[str, Any]) -> "Figure":
    """Forecast against measured error per setting (with bands), and the relative errors sorted."""
    rows = result["rows"]
    predicted = np.array([r["predicted"] for r in rows], dtype=float)
    measured = np.array([r["measured"] for r in rows], dtype=float)
    low = np.array([r["low"] for r in rows], dtype=float)
    high = np.array([r["high"] for r in rows], dtype=float)
    inside = (low <= measured) & (measured <= high)
    figure = _blank_figure(10.0, 4.2)
    left, right = figure.subplots(1, 2, width_ratios=[1.1, 1.0])
    left.set_label("forecast vs measured")
    errors = np.vstack([predicted - low, high - predicted]).clip(min=0)
    for mask, face, label in ((inside, "#1d5c8c", "measured value inside the band"),
                              (~inside, "white", "measured value outside the band")):
        if mask.any():
            left.errorbar(measured[mask], predicted[mask], yerr=errors[:, mask], fmt="o",
                          color="#1d5c8c", markerfacecolor=face, markersize=5, capsize=2,
                          linewidth=0.9, label=label)
    span = [float(min(measured.min(), low.min())), float(max(measured.max(), high.max()))]
    left.plot(span, span, color="#555555", linestyle="--", linewidth=1, label="forecast = measured")
    left.set_xlabel("measured validation error at the full size")
    left.set_ylabel("forecast from the smaller sizes")
    left.legend(fontsize=8, frameon=False)
    left.grid(True, color="#e6e6e6", linewidth=0.7)
    right.set_label("relative error")
    relative = np.array([abs(p - m) / m if m > 0 else np.nan for p, m in zip(predicted, measured)])
    order = np.argsort(np.nan_to_num(relative, nan=-1.0))
    right.bar(np.arange(len(order)), 100 * np.nan_to_num(relative[order]),
              color=["#1d5c8c" if inside[i] else "#c7d7e6" for i in order], edgecolor="#1d5c8c")
    right.set_xlabel("settings, sorted")
    right.set_ylabel("|forecast − measured| / measured (%)")
    right.set_xticks([])
    right.grid(True, axis="y", color="#e6e6e6", linewidth=0.7)
    figure.suptitle(f"Backtest: forecast at {result.get('full_size', '?')} rows from the smaller sizes",
                    fontsize=11, x=0.02, ha="left")
    return figure


def _backtest_section(inputs: ReportInputs, number: int) -> Markup:
    result = inputs.backtest
    if result is None:
        note = inputs.backtest_note or (
            f"No backtest is stored in this run folder ({BACKTEST_FILE}). A backtest fits curves on a "
            f"fraction of the data and checks their forecast against the full size; it shows how far "
            f"to trust the forecasts on this data.")
        return section("backtest", number, "Backtest", [para(note, "note")])
    rows = result["rows"]
    median = result.get("median_abs_rel_error")
    coverage = result.get("coverage")
    confidence = result.get("confidence") or inputs.confidence
    summary = (f"Curves were fitted on sizes {', '.join(_count(s) for s in result.get('fitted_sizes', []))} "
               f"and asked for the error at {_count(result.get('full_size'))} rows. Median relative "
               f"error {'–' if median is None else f'{median:.1%}'}; the measured value fell inside "
               f"the {confidence:.0%} band for {'–' if coverage is None else f'{coverage:.0%}'} of "
               f"{len(rows)} settings.")
    rows_table = table(["capacity", "regularisation", "curve", "forecast [band]", "measured",
                    "relative error", "inside band"],
                   [[r.get("capacity", "?"), r.get("regularization", "?"), r.get("family", "?"),
                     _with_band(r["predicted"], [r["low"], r["high"]]), _num(r["measured"]),
                     "–" if r.get("rel_error") is None else f"{r['rel_error']:.1%}",
                     "yes" if r["low"] <= r["measured"] <= r["high"] else "no"] for r in rows],
                   css="numbers backtest")
    return section("backtest", number, "Backtest", [
        Markup(f"<p id=\"backtest-summary\"{_value_attr(median)}>{esc(summary)}</p>"),
        drawn(lambda: backtest_figure(result), "Backtest: forecast against measured error",
               "Left: each setting's forecast (with its band) against what was measured. "
               "Right: relative errors, sorted; pale bars missed the band."),
        rows_table])


def _skipped_section(inputs: ReportInputs, number: int) -> Markup:
    cells = inputs.cells
    failed = cells[cells["status"] != "ok"]
    unfitted = list(getattr(inputs.fits, "unfitted", []))
    body = []
    if failed.empty and not unfitted:
        body.append(para(f"All {len(cells):,} fold fits finished and every setting got a learning curve."))
        return section("skipped", number, "Skipped and failed cells", body)
    if not failed.empty:
        body.append(para(f"{len(failed):,} of {len(cells):,} fold fits failed; they are left out of "
                       f"every number and picture above."))
        rows = [[str(c), str(r), f"{len(group):,}",
                 ", ".join(f"{int(m):,}" for m in sorted(group["train_size"].unique())),
                 str(group["message"].iloc[0])[:200]]
                for (c, r), group in failed.groupby(["capacity", "regularization"], sort=False)]
        body.append(table(["capacity", "regularisation", "failed fits", "at sizes", "first message"],
                           rows, css="failed"))
    if unfitted:
        body.append(para(f"{len(unfitted)} setting(s) got no learning curve, so they have no forecast:"))
        body.append(table(["capacity", "regularisation", "why"],
                           [[u.get("capacity", "?"), u.get("regularization", "?"), u.get("reason", "?")]
                            for u in unfitted], css="failed"))
    return section("skipped", number, "Skipped and failed cells", body)


def _cautions_section(inputs: ReportInputs, number: int) -> Markup:
    conf = f"{inputs.confidence:.0%}"
    points = [
        "Forecasts beyond the largest measured size are extrapolations: a curve shape fitted to the "
        "sizes you measured is assumed to hold further out. The further a forecast reaches, the less "
        "it is worth; a backtest on this data tells you how well that has worked so far.",
        f"The bands are {conf} bootstrap bands over the folds. They cover the scatter this run "
        f"could see, not every way the future can differ; they are not a guarantee.",
        "Every number was measured on this data set's rows. New rows from another source, season, "
        "instrument or labelling process can behave differently.",
        "The noise-floor estimate is the lowest asymptote among the fitted curves. Better features or "
        "cleaner labels can lower the true floor; a model family outside this grid may get closer "
        "to it.",
        "Plans are the cheapest only under the costs in this report; change the costs and the order "
        "of moves can change.",
    ]
    items = "".join(f"<li>{esc(p)}</li>" for p in points)
    return section("cautions", number, "Read with care", [Markup(f"<ul class=\"cautions\">{items}</ul>")])


def _footer(inputs: ReportInputs) -> Markup:
    from gridplan import __version__
    return Markup(f"<footer><p>Written by gridplan {esc(__version__)} on "
                  f"{esc(inputs.written.strftime('%Y-%m-%d %H:%M'))} UTC from {esc(inputs.run.run_dir or 'a grid in memory')}. "
                  f"Curves: {esc(inputs.n_boot)} bootstrap resamples, seed {esc(inputs.seed)}. "
                  f"This file is self-contained: it needs no network and no scripts.</p></footer>")


def report_html(inputs: ReportInputs, jobs: int | None = None) -> str:
    """The whole report as one HTML document, its figures drawn `jobs` at a time (None: every core)."""
    return with_figures(lambda: _page(inputs), jobs)


def _page(inputs: ReportInputs) -> str:
    sections = [_job_section, _models_section, _diagnosis_section, _plan_section, _actions_section,
                _maps_section, _curves_section, _settings_section, _backtest_section,
                _skipped_section, _cautions_section]
    several = inputs.advice is not None and len(inputs.advice.get("models") or []) > 1
    parts, number = [], 0
    for build in sections:
        if build is _actions_section and inputs.advice is None:
            continue
        if build is _models_section and not several:
            continue
        number += 1
        parts.append(build(inputs, number))
    return render_page(title=f"gridplan report: {_run_name(inputs.run)}",
                       style=Markup(page_style()), masthead=_masthead(inputs),
                       glance=_at_a_glance(inputs), sections=join(parts),
                       footer=_footer(inputs))


def _writable_target(run_dir: Path, out: str | Path | None) -> Path:
    """The report path, refused early when it cannot be written."""
    path = Path(out) if out is not None else run_dir / REPORT_NAME
    from gridplan.measuring.runs import refuse_run_file
    refuse_run_file(run_dir, path, run_dir / REPORT_NAME)
    if path.is_dir():
        raise GridplanError(f"cannot write the report to {path}: it is a folder; give a file name "
                            f"such as {path / REPORT_NAME}.")
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise GridplanError(f"cannot create the folder for the report {path}: "
                            f"{exc.strerror or exc}.") from None
    if not os.access(path.parent, os.W_OK) or (path.exists() and not os.access(path, os.W_OK)):
        raise GridplanError(f"cannot write the report to {path}: permission denied.")
    return path


def write_report(run_dir: str | Path, out: str | Path | None = None, *,
                 target: float | None = None, confidence: float | None = None,
                 at: str | None = None, n_boot: int = DEFAULT_BOOT, seed: int = 0,
                 model: str | None = None) -> Path:
    """Write the HTML report of a run (default RUN_DIR/report.html) and return its path.

    `target`, `confidence` and `at` ("CAPACITY,REG") override the config as in
    `gridplan.deciding.advisor.advise`. Without a known target the report is still
    written, without a verdict or plan, and says why.
    """
    from gridplan.measuring.store import STORE_NAME
    run_dir = Path(run_dir)
    if not (run_dir / STORE_NAME).is_file():
        raise GridplanError(f"{run_dir} is not a gridplan run folder (no {STORE_NAME}).")
    path = _writable_target(run_dir, out)
    return write_inputs(gather_inputs(run_dir, target=target, confidence=confidence, at=at,
                                      n_boot=n_boot, seed=seed, model=model), path)


def write_inputs(inputs: ReportInputs, path: Path) -> Path:
    """Render gathered inputs and replace `path` with the page in one step."""
    text = report_html(inputs)
    try:
        with replaced(path) as temporary:
            temporary.write_text(text, encoding="utf-8")
            os.chmod(temporary, 0o644)
    except OSError as exc:
        raise GridplanError(f"cannot write the report to {path}: {exc.strerror or exc}.") from None
    return path
