"""Terminal text: tables of curves, advice and backtests."""

from __future__ import annotations

from gridplan.common.wording import interval, money, number


def _size(value) -> str:
    return "-" if value is None else f"{int(value):,}"


def render_summary(summary: dict) -> str:
    """Plain-text table of a curves summary, one line per setting."""
    conf = summary["confidence"]
    headers = ["capacity", "regularization", "family", "plateau [band]",
               "error @ largest size", "error @ 2x size [band]", "rows needed", "notes"]
    lines = []
    for s in summary["settings"]:
        notes = []
        if s["band_too_wide"]:
            forecast = "band too wide"
        else:
            forecast = (f"{number(s['predicted_2x'])} [{number(s['predicted_2x_low'])}, "
                        f"{number(s['predicted_2x_high'])}]")
        horizon = s["horizon_size"]
        central = s["samples_needed_point"] or s["samples_needed"]
        if s["reachable"] and s["samples_needed"] <= horizon:
            samples = (f"about {_size(central)}; {_size(s['samples_needed'])} to be "
                       f"{conf:.0%} sure")
            if s["samples_needed"] <= s["largest_size"]:
                notes.append("target already met at the measured sizes")
        elif s["reachable"] is None:
            samples = "-"
        elif s["samples_needed_point"] is not None and s["samples_needed_point"] > horizon:
            samples = f"beyond {_size(horizon)}"
            notes.append(beyond_horizon_words(s["samples_needed_point"], horizon,
                                              s["largest_size"]))
        elif s["reachable"]:
            samples = f"about {_size(central)}; beyond {_size(horizon)} to be {conf:.0%} sure"
            notes.append(beyond_horizon_words(s["samples_needed"], horizon, s["largest_size"],
                                              f"{conf:.0%} sure"))
        elif s["samples_needed_point"] is not None:
            samples = f"about {_size(s['samples_needed_point'])}; not at {conf:.0%}"
            notes.append(s["reason"])
        else:
            samples = "not reachable"
            notes.append(s["reason"])
        if s["own_check_error"] is not None and _rough(s["own_check_error"]):
            notes.append(own_check_words(s["own_check_error"]))
        if s["plateau_at_floor"]:
            notes.append("plateau not determined: the curve still falls at the largest size and is "
                         "held at the shared floor's lower edge")
        check = s["midpoint_check"]
        if check.get("disagree"):
            notes.append("floor outside the training/validation bracket")
        if s["skipped_rows"]:
            notes.append(f"rows skipped: {s['skipped_rows']}")
        plateau = (f">= {number(s['asymptote'])} (floor edge)" if s["plateau_at_floor"] else
                   f"{number(s['asymptote'])} [{number(s['asymptote_low'])}, "
                   f"{number(s['asymptote_high'])}]")
        lines.append([s["capacity"], s["regularization"], s["family"], plateau,
                      f"{number(s['error_at_largest'])} @ {_size(s['largest_size'])}",
                      forecast, samples, "; ".join(notes)])
    widths = [max(len(str(row[i])) for row in [headers] + lines) for i in range(len(headers))]
    title = f"Learning curves: target {number(summary['target'])}, bands at {conf:.0%} confidence"
    out = [title, "  ".join(h.ljust(w) for h, w in zip(headers, widths)).rstrip(),
           "  ".join("-" * w for w in widths)]
    out += ["  ".join(str(c).ljust(w) for c, w in zip(row, widths)).rstrip() for row in lines]
    for u in summary.get("unfitted", []):
        out.append(f"{u['capacity']}  {u['regularization']}  not fitted: {u['reason']}")
    if summary.get("calibration"):
        from gridplan.deciding.calibration import Calibration
        out.append(f"Forecasts beyond the data: {Calibration(**summary['calibration']).sentence()}.")
    return "\n".join(out)


def fold_test_words(test: dict | None, what: str = "") -> str:
    """A one-sided t-test over folds in words: mean, interval, t, df, p and variance factor."""
    if not test:
        return f"{what}: too few folds to test" if what else "too few folds to test"
    lead = f"{what} " if what else ""
    return (f"{lead}{number(test['mean'])}, {test['confidence']:.0%} interval "
            f"{interval([test['low'], test['high']])}; t = {number(test['t'], 3)} on {test['dof']} "
            f"df, one-sided p = {number(test['p_value'], 2)} (corrected variance factor "
            f"{number(test['factor'], 4)})")


def _rough(error: float) -> bool:
    from gridplan.deciding.calibration import OWN_CHECK_CAUTION
    return error > OWN_CHECK_CAUTION


def own_check_words(error: float) -> str:
    """What a setting's own extrapolation check found, with a caution when it missed widely."""
    text = f"refitted on its smaller sizes, this curve forecast its larger ones {error:.0%} off"
    return text + (": a rough forecast" if _rough(error) else "")


def beyond_horizon_words(rows: int, horizon: int, largest: int, what: str = "there") -> str:
    """Why rows needed past the checked horizon are not given as a number."""
    near = f"{rows:,}" if rows < 1e7 else f"{rows:.2g}"
    times = f"{rows / largest:.0f}x" if rows < 1000 * largest else "over 1,000x"
    return (f"the fitted curve gets {what} near {near} rows, {times} the largest measured "
            f"size; forecasts are checked only up to {horizon / largest:g}x: measure at larger "
            f"sizes before counting on it")


def rising_step_words(step: dict, last: bool) -> str:
    """Why a plan takes a step whose predicted error is above the one before it."""
    before = step["from"]
    rise = number(step["predicted_error"] - before["predicted_error"])
    if step["action"] == "more-data" and before["measured"]:
        why = (f"the curve fitted to every size runs {rise} above the mean measured at "
               f"{before['size']:,} rows")
    else:
        why = f"the error rises by {rise} on this step, from {number(before['predicted_error'])}"
    if last:
        return f"{why}, but here the whole interval lies at or below the target"
    return f"{why}: it is the cheapest way to the steps after it, which end at the target"


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
    models = advice.get("models") or []
    several = len(models) > 1

    def setting(where: dict) -> str:
        """CAPACITY,REG, with the model's name first when the run has several."""
        text = f"{where['capacity']},{where['regularization']}"
        return f"{where['model']} {text}" if several else text

    lines = [
        advice["headline"],
        "",
        f"Advice for {advice['run_dir']}  ({advice['metric']}, target {advice['target']:g}, "
        f"{advice['confidence']:.0%} confidence)",
        f"Operating point: {'model ' + op['model'] + ', ' if several else ''}capacity "
        f"{op['capacity']}, regularisation {op['regularization']}, "
        f"{op['size']:,} training rows ({op['chosen']})",
    ]
    if several:
        lines.append("Models (each at its best measured setting):")
        for m in models:
            plateau = ("-" if m["plateau"] is None else
                       f"{number(m['plateau'])} {interval(m['plateau_band'])}")
            own = ("meets the target as it is" if m["reachable"] and not m["plan_cost"] else
                   f"own plan {money(m['plan_cost'])}" if m["reachable"]
                   else f"no plan of its own ({m['binding_limit']})")
            lines.append(f"  {m['name']:<12} {m['family'] or '':<12} {m['capacity_param']} / "
                         f"{m['regularization_param']} {m['best_setting']:<12} validation "
                         f"{number(m['validation_error'])}   plateau {plateau}   {own}")
    lines += [
        "",
        f"Verdict: {advice['verdict'].upper()}",
        f"  because {advice['verdict_reason']}",
        f"  training error {number(d['train_error'])}   validation error {number(d['validation_error'])}   "
        f"over {d['units']} folds",
        f"  {fold_test_words(d['gap_test'], 'gap')}",
    ]
    if d["previous_size"] is not None:
        what = f"drop per doubling ({d['previous_size']:,} -> {d['size']:,})"
        lines.append(f"  {fold_test_words(d['drop_per_doubling'], what)}")
    if d["curve_drop_next_doubling"] is not None:
        own = d.get("own_check_error")
        lines.append(f"  fitted curve: drop over the next doubling {number(d['curve_drop_next_doubling'])}, "
                     f"this setting's asymptote {number(d['setting_asymptote'])} "
                     f"{interval(d['setting_asymptote_band'])}"
                     + ("" if own is None else f"; {own_check_words(own)}"))
    if advice["noise_floor"] is not None:
        source = (f"model {advice['noise_floor_model']} setting" if several else "setting")
        lines.append(f"  noise floor {number(advice['noise_floor'])} {interval(advice['noise_floor_band'])}"
                     f" (from {source} {advice['noise_floor_setting']}: "
                     f"{advice['noise_floor_evidence']})")
    else:
        kinds = "capacity or model" if several else "capacity"
        whose = (f"the lowest plateau of any model, {advice.get('plateau_model')}'s" if several
                 else "this model's lowest plateau")
        lines.append(f"  noise floor unknown (no converged settings of different {kinds} agree, "
                     f"and none has its training error below its plateau); {whose} "
                     f"{number(advice['plateau'])} {interval(advice['plateau_band'])}"
                     f" (setting {advice['plateau_setting']}) bounds it from above")
    if advice.get("calibration"):
        from gridplan.deciding.calibration import Calibration
        lines.append(f"  forecasts: {Calibration(**advice['calibration']).sentence()}")
    if advice["noise_floor_at_capacity_edge"]:
        lines.append("  (found at the grid's largest capacity and still falling with capacity: it may "
                     "include bias, so no noise-floor verdict is given)")
    if d["removable_by_data"] is not None:
        left = d["not_removable"]
        meaning = left_with_unlimited_data(left)
        lines.append(f"  excess over target {number(d['validation_error'] - advice['target'])} = "
                     f"{number(d['removable_by_data'])} {interval(d['removable_band'])} more data can remove"
                     f" + {number(left)} {interval(d['not_removable_band'])} left with unlimited data "
                     f"(asymptote minus target; {meaning})")
    lines.append("")
    if advice["reachable"]:
        if not advice["plan"]:
            lines.append("Plan: nothing to do; the operating point already meets the target.")
        else:
            if advice["verdict"] == "fine":
                lines.append(mean_meets_but_interval_not(advice["confidence"]))
            lines.append(f"Cheapest plan (total cost {money(advice['plan_cost'])}; a state meets the "
                         f"target when its whole {advice['confidence']:.0%} interval is at or below it):")
            for i, step in enumerate(advice["plan"], 1):
                to = step["to"]
                lines.append(f"  {i}. {step['action']:<20} -> {setting(to)} "
                             f"at {to['size']:,}   cost {money(step['cost'])}   cumulative "
                             f"{money(step['cumulative_cost'])}   predicted error "
                             f"{number(step['predicted_error'])} {interval(to['interval'])}"
                             f"{' (measured)' if to['measured'] else ''}")
                if step.get("worse_on_the_way"):
                    lines.append(f"     {rising_step_words(step, last=i == len(advice['plan']))}")
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
            tied[item["plan_cost"]].append(f"{item['action']} to {setting(item['to'])}")
            continue
        if item["reachable"]:
            tied[item["plan_cost"]] = []
        if item["to"] is None:
            lines.append(f"  {item['action']:<20} not possible: {item['reason']}")
            continue
        to = item["to"]
        where = (f"to {to['size']:,} rows" if item["action"] == "more-data"
                 else f"to {setting(to)}")
        head = (f"  {item['action']:<20} {where:<18} step {money(item['step_cost'])}  "
                f"error {number(item['predicted_error'])} {interval(item['interval'])}")
        if item["reachable"]:
            tail = f"  plan {money(item['plan_cost'])}" + (
                f" (then {', '.join(item['then'])})" if item["then"] else "")
        else:
            tail = f"  cannot reach: {item['reason']}"
        lines.append(head + tail)
    for cost, others in tied.items():
        if others:
            lines.append(f"  {'':<20} same plan cost {money(cost)} also by: {'; '.join(others)}")
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


def render_backtest(result: dict) -> str:
    """Plain-text table of a backtest."""
    lines = [f"backtest: curves fitted on sizes {', '.join(map(str, result['fitted_sizes']))}; "
             f"forecast at {result['full_size']} rows vs measured ({result['metric']})",
             f"{'capacity':>10} {'regularization':>14} {'family':>6} {'predicted':>10} "
             f"{'band':>21} {'measured':>10} {'rel err':>8}  in band"]
    several = len(result.get("models") or []) > 1
    shown = None
    for r in result["rows"]:
        band = f"[{r['low']:.3g}, {r['high']:.3g}]"
        if several and r["model"] != shown:
            lines.append(f"model {r['model']}")
            shown = r["model"]
        rel = "-" if r["rel_error"] is None else f"{r['rel_error']:.1%}"
        lines.append(f"{r['capacity']:>10} {r['regularization']:>14} {r['family']:>6} "
                     f"{r['predicted']:>10.3g} {band:>21} {r['measured']:>10.3g} {rel:>8}  "
                     f"{'yes' if r['inside_band'] else 'no'}")
    from gridplan.deciding.calibration import Calibration
    for name, calibration in (result.get("calibrations") or {}).items():
        if calibration:
            whose = f" of model {name}" if several else ""
            lines.append(f"calibration from the fitted sizes{whose}: "
                         f"{Calibration(**calibration).sentence()}")
    median = result["median_abs_rel_error"]
    lines.append(f"median |relative error| {'-' if median is None else f'{median:.1%}'}; "
                 f"measured value inside the {result['confidence']:.0%} band for "
                 f"{result['coverage']:.0%} of {len(result['rows'])} settings")
    return "\n".join(lines)
