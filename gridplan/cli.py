"""The `gridplan` command line: a thin face over gridplan.api.

Heavy libraries are imported inside the commands so that `--help` answers fast.
"""

from __future__ import annotations

import functools
import sys
from contextlib import contextmanager
from pathlib import Path
from typing import Callable, Optional

import typer

from gridplan.common.checks import DEFAULT_BOOT
from gridplan.common.wording import plural

app = typer.Typer(add_completion=False, no_args_is_help=True,
                  help="Measure a capacity x regularisation x data-size grid, forecast its "
                       "learning curves and plan the cheapest way to a target error.")


def _fail(message: str, code: int = 1) -> None:
    typer.echo(f"gridplan: {message}", err=True)
    raise typer.Exit(code)


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    """Library warnings as one plain line, without file and line numbers."""
    typer.echo(f"gridplan: warning: {message}", err=True)


def friendly(command: Callable | None = None, *, measures: bool = False) -> Callable:
    """Turn GridplanError into one sentence and exit 1; Ctrl-C into one line and exit 130.

    Commands that measure cells (`measures=True`) say how to resume; the others
    write their files whole or not at all, so an interruption leaves nothing half done.
    """
    if command is None:
        return functools.partial(friendly, measures=measures)
    interrupted = ("interrupted; every finished cell is saved. Run the same command again to "
                   "resume." if measures else "interrupted; no file was left half written.")

    @functools.wraps(command)
    def wrapper(*args, **kwargs):
        import warnings

        from gridplan.common.errors import GridplanError
        warnings.showwarning = _show_warning
        try:
            return command(*args, **kwargs)
        except GridplanError as exc:
            _fail(str(exc))
        except KeyboardInterrupt:
            _fail(interrupted, code=130)
    return wrapper


class _Spinner:
    """rich's status line on stderr, whose refresh thread can be stopped and started again."""

    def __init__(self, message: str):
        from rich.console import Console
        self.status = Console(stderr=True).status(f"{message} ...", spinner="line")
        self.threads: list = []

    def start(self) -> None:
        import threading
        before = set(threading.enumerate())
        self.status.start()
        self.threads = [t for t in threading.enumerate() if t not in before]

    def stop(self) -> None:
        self.status.stop()
        for thread in self.threads:     # ended before we fork, so no lock of its is held
            thread.join()
        self.threads = []


@contextmanager
def _busy(message: str):
    """A spinner on stderr while a deciding command works (terminals only).

    Its thread is stopped for the moments the work forks (gridplan.common.forked).
    """
    if not sys.stderr.isatty():
        yield
        return
    from gridplan.common.forked import paused_while_forking
    spinner = _Spinner(message)
    spinner.start()
    try:
        with paused_while_forking(spinner.stop, spinner.start):
            yield
    finally:
        spinner.stop()


def _describe(spec, run_dir: Path) -> str:
    """The grid a config describes, a line per fact (a block per model table)."""
    c, d = spec.config, spec.dataset
    lines = [
        ("config", str(c.source)),
        ("data", f"{c.data_path.name}: {d.n_rows} rows, {len(d.numeric)} numeric + "
                 f"{len(d.categorical)} categorical features, target {c.target!r} ({c.task})"),
    ]
    for model in spec.models:
        lines += _model_lines(model, named=len(spec.models) > 1)
    lines += [
        ("train sizes", ", ".join(map(str, spec.sizes))),
        ("resampling", f"{plural(c.folds, 'fold')} x {plural(c.repeats, 'repeat')}, seed {c.seed}"
                       + (f", grouped by {c.groups_column!r}" if c.groups_column else "")
                       + (f", forward in time by {c.time_column!r}" if c.time_column else "")
                       + (f"; weights {c.weights_column!r}" if c.weights_column else "")),
        ("metric", c.metric + (f", target {c.target_error:g}" if c.target_error else "")),
        ("grid", f"{spec.n_cells} cells ({spec.n_settings} settings x {len(spec.sizes)} sizes), "
                 f"{spec.n_fits} fits"),
        ("run folder", str(run_dir)),
    ]
    width = max(len(k) for k, _ in lines)
    return "\n".join(f"{k.ljust(width)}  {v}" for k, v in lines)


def _model_lines(model, named: bool) -> list[tuple[str, str]]:
    from gridplan.measuring.runner import fast_path_kind
    c = model.config
    cap, reg = c.capacity, c.regularization
    cap_text = (f"feature sets: {', '.join(cap.labels)}" if cap.feature_sets
                else f"{cap.param}: {', '.join(cap.labels)} (more capacity to the right)")
    reg_text = (f"{reg.param}: {', '.join(reg.labels)} (more regularisation to the right)"
                if reg.param else "none")
    path = (fast_path_kind(model.plan, c.metric) if c.fast_path else None) or "plain fits"
    kind = f"{model.plan.family or c.estimator} ({path})"
    return [("model", f"{model.model_label}: {kind}" if named else kind),
            ("  capacity" if named else "capacity", cap_text),
            ("  regularization" if named else "regularization", reg_text)]


@app.command()
@friendly
def check(config: Path = typer.Argument(..., help="TOML config file."),
          out: Optional[Path] = typer.Option(None, "--out", help="Run folder (default outputs/<name>)."),
          allow_any_estimator: bool = typer.Option(False, "--allow-any-estimator",
                                                   help="Allow estimators outside sklearn.*")):
    """Validate a config against its data and print the grid it describes."""
    from gridplan import api
    spec = api.check(config, allow_any_estimator=allow_any_estimator)
    typer.echo(_describe(spec, out or api.default_run_dir(spec.config)))
    typer.echo(_estimate_line(spec, api.effective_jobs(spec.config, None))[1])


#: A run estimated to take longer than this asks before it starts (on a terminal).
CONFIRM_ABOVE_SECONDS = 30 * 60


@app.command()
@friendly(measures=True)
def run(config: Path = typer.Argument(..., help="TOML config file."),
        out: Optional[Path] = typer.Option(None, "--out", help="Run folder (default outputs/<name>)."),
        jobs: Optional[int] = typer.Option(None, "--jobs", "-j", help="Worker processes (-1: all cores)."),
        scheduler: Optional[str] = typer.Option(None, "--scheduler",
                                                help="Address of a running dask scheduler."),
        yes: bool = typer.Option(False, "--yes", "-y", help="Do not ask for confirmation."),
        quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar."),
        allow_any_estimator: bool = typer.Option(False, "--allow-any-estimator",
                                                 help="Allow estimators outside sklearn.*")):
    """Evaluate the grid (resuming a partial run in the same folder)."""
    from gridplan import api
    spec = api.check(config, allow_any_estimator=allow_any_estimator)
    run_dir = out or api.default_run_dir(spec.config)
    if not quiet:
        typer.echo(_describe(spec, run_dir))
    seconds, line, probed = _estimate_line(spec, api.effective_jobs(spec.config, jobs),
                                           _finished_keys(run_dir, len(spec.models)))
    if not quiet:
        typer.echo(line)
    if seconds > CONFIRM_ABOVE_SECONDS and not yes and _on_terminal():
        if not typer.confirm("This grid will run for a long time. Start it?", default=False):
            _fail("not started.", code=1)
    with _progress_bar(spec, quiet) as progress:
        api.run(spec.config, out=run_dir, jobs=jobs, scheduler=scheduler,
                allow_any_estimator=allow_any_estimator, progress=progress, spec=spec,
                ready=() if scheduler else probed)
    cells = api.open_run(run_dir).all_cells()
    failed = int((cells["status"] != "ok").sum())
    typer.echo(f"done: {len(cells)} fits stored in {run_dir}"
               + (f"; {failed} failed (see `gridplan export`)" if failed else ""))



def _on_terminal() -> bool:
    """True when a person can answer a prompt."""
    return sys.stdin.isatty()


def _duration(seconds: float) -> str:
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 90 * 60:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"


def _estimate_line(spec, jobs: int, done: list[set] | None = None) -> tuple[float, str, list]:
    """Time unfinished tasks at the largest size per model and scale them to the rest.

    Returns (seconds, the line to print, per model the probe's rows for the run to keep).
    """
    from gridplan.measuring.runner import estimate_seconds
    seconds, probe, tasks, probed = 0.0, 0.0, 1, []
    for index, model in enumerate(spec.models):
        estimate = estimate_seconds(model, jobs, done[index] if done else None)
        seconds += estimate.seconds
        if estimate.probe_seconds > probe:
            probe, tasks = estimate.probe_seconds, estimate.probe_tasks
        probed.append(estimate.rows)
    if probe == 0.0:
        return 0.0, f"{'estimate'.ljust(14)}  nothing left to run: every fit is stored", probed
    timed = ("one task at the largest size took" if tasks == 1 else
             f"{tasks} tasks at the largest size, side by side, took")
    return seconds, (f"{'estimate'.ljust(14)}  about {_duration(seconds)} with {jobs} worker"
                     f"{'s' if jobs > 1 else ''} ({timed} {probe:.2f} s)"), probed


def _finished_keys(run_dir: Path, models: int = 1) -> list[set]:
    """Per model table, the fits an earlier run in this folder already stored."""
    from gridplan.measuring.store import STORE_NAME, Store
    if not (Path(run_dir) / STORE_NAME).is_file():
        return [set() for _ in range(models)]
    out = []
    for index in range(models):
        with Store.open_existing(run_dir, model=index) as store:
            out.append(store.finished_keys())
    return out


class _progress_bar:
    """A rich progress bar fed by the runner's (done, total) callback."""

    def __init__(self, spec, quiet: bool):
        self.quiet = quiet
        self.folds = len(spec.folds)
        self.cells = spec.n_cells
        self.bar = None

    def __enter__(self):
        if self.quiet:
            return None
        from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn
        self.bar = Progress(TextColumn("[bold]grid"), BarColumn(),
                            TextColumn("{task.fields[cells]}"),
                            TextColumn("{task.fields[rate]}"), TimeRemainingColumn(),
                            transient=False)
        self.bar.start()
        self.task = self.bar.add_task("grid", total=self.cells * self.folds,
                                      cells="", rate="")
        import time
        self._t0, self._first = time.monotonic(), None
        return self.update

    def update(self, done: int, total: int) -> None:
        import time
        now = time.monotonic()
        if self._first is None:
            self._first = done
        rate = (done - self._first) / max(now - self._t0, 1e-9)
        self.bar.update(self.task, completed=done, total=total,
                        cells=f"{done // self.folds}/{self.cells} cells",
                        rate=f"{rate:,.0f} fits/s")

    def __exit__(self, *exc):
        if self.bar is not None:
            self.bar.stop()
        return False


@app.command()
@friendly
def export(run_dir: Path = typer.Argument(..., help="Run folder."),
           output: Path = typer.Option(..., "-o", "--output", help="CSV (or .parquet) to write."),
           force: bool = typer.Option(False, "--force",
                                      help="Replace an existing file that is not an earlier "
                                           "export of this run.")):
    """Write the tidy per-fold table of a run."""
    from gridplan import api
    n = api.export_cells(run_dir, output, force=force)
    typer.echo(f"wrote {n} rows to {output}")


@app.command()
@friendly(measures=True)
def demo(out: Path = typer.Option(Path("outputs/demo"), "--out", help="Folder for data, config and run."),
         jobs: Optional[int] = typer.Option(None, "--jobs", "-j"),
         quiet: bool = typer.Option(False, "--quiet", "-q")):
    """Generate the orchard scenario, run its grid and summarise it."""
    from gridplan import api
    from gridplan.demo import NOISE_FLOOR_MSE, write_demo
    config_path = write_demo(out)
    typer.echo(f"demo data and config written to {out}")
    spec = api.check(config_path)
    with _progress_bar(spec, quiet) as progress:
        api.run(spec.config, out=out / "run", jobs=jobs, progress=progress, spec=spec)
    cells = api.open_run(out / "run").cells()
    typer.echo(_demo_summary(cells, NOISE_FLOOR_MSE))
    from gridplan.showing.gather import gather_inputs
    from gridplan.showing.report import REPORT_NAME, write_inputs
    with _busy("fitting learning curves and writing the report"):
        inputs = gather_inputs(out / "run")
        path = write_inputs(inputs, out / "run" / REPORT_NAME)
    if inputs.advice is not None:
        typer.echo(_advice_summary(inputs.advice))
    typer.echo(f"report: {path}")


def _advice_summary(advice: dict) -> str:
    """Two lines: the verdict and the cheapest plan."""
    lines = [f"verdict: {advice['verdict']} (target {advice['target']:g})"]
    if advice.get("reachable") and advice.get("plan"):
        steps = ", ".join(_step_words(step) for step in advice["plan"])
        lines.append(f"cheapest plan, cost {advice['plan_cost']:,.0f}: {steps}")
    elif advice.get("reachable"):
        lines.append("no change needed: the operating point meets the target")
    else:
        lines.append(f"no plan reaches the target; binding limit: {advice.get('binding_limit')}")
    return "\n".join(lines)


def _step_words(step: dict) -> str:
    target = step.get("to") or {}
    if step["action"] == "more-data" and isinstance(target, dict) and "size" in target:
        return f"more-data to {target['size']:,} rows"
    return step["action"]


@app.command()
@friendly
def curves(run_dir: Path = typer.Argument(..., help="Run folder."),
           target: Optional[float] = typer.Option(None, "--target", help="Target error (default: the config's)."),
           confidence: Optional[float] = typer.Option(None, "--confidence", help="Band confidence (default: the config's)."),
           as_json: bool = typer.Option(False, "--json", help="Print JSON instead of a table."),
           plot: bool = typer.Option(False, "--plot", help="Also draw the curves to a PNG/SVG."),
           output: Optional[Path] = typer.Option(None, "-o", "--output", help="Plot file (with --plot)."),
           model: Optional[str] = typer.Option(None, "--model",
                                               help="Only this model (runs of several models; default all)."),
           boot: int = typer.Option(DEFAULT_BOOT, "--boot", help="Bootstrap resamples per curve.")):
    """Fit, extrapolate and summarise each setting's learning curve."""
    import json

    from gridplan import api
    from gridplan.showing.text import render_summary
    names = api.open_run(run_dir, model=model).model_names
    chosen = [model] if model is not None or len(names) == 1 else names
    with _busy("fitting learning curves"):
        summaries = [api.curves_report(run_dir, target=target, confidence=confidence,
                                       n_boot=boot, model=name) for name in chosen]
    if as_json:
        typer.echo(json.dumps(summaries[0].to_dict() if len(summaries) == 1 else
                              {"models": [s.to_dict() for s in summaries]}, indent=2))
    else:
        typer.echo("\n\n".join(render_summary(s) if len(summaries) == 1 else
                                f"model {s['model']}\n{render_summary(s)}" for s in summaries))
    if plot:
        path = _plot_curves(run_dir, summaries[0], output, boot, chosen[0])
        if not as_json:
            typer.echo(f"curves drawn to {path}" + (f" (model {summaries[0]['model']}; pick "
                                                     f"another with --model)"
                                                     if len(summaries) > 1 else ""))


def _plot_curves(run_dir: Path, summary: dict, output: Optional[Path], boot: int,
                 model: str | None) -> Path:
    from gridplan import api
    from gridplan.showing import figures
    run = api.open_run(run_dir, model=model)
    fits = api.fit_curves(run_dir, n_boot=boot, model=run.model)
    figure = figures.small_multiples_figure(run, fits, target=summary.get("target"))
    name = "curves.png" if run.model == 0 else f"curves-{run.model_name}.png"
    path = output or (Path(run_dir) / name)
    api.refuse_run_file(run_dir, path, Path(run_dir) / name)
    figures.save_figure(figure, path)
    return path


@app.command()
@friendly
def heatmap(run_dir: Path = typer.Argument(..., help="Run folder."),
            show: str = typer.Option("validation", "--show", help="validation, train or gap."),
            axis: str = typer.Option("capacity", "--axis", help="capacity or regularization (rows of the map)."),
            capacity: Optional[str] = typer.Option(None, "--capacity",
                                                   help="Capacity label for --axis regularization."),
            output: Optional[Path] = typer.Option(None, "-o", "--output", help="PNG or SVG file."),
            with_plan: bool = typer.Option(False, "--plan", help="Draw the operating point and the plan."),
            target: Optional[float] = typer.Option(None, "--target", help="Target error (default: the config's)."),
            model: Optional[str] = typer.Option(None, "--model",
                                                help="Model to draw (runs of several models; default "
                                                     "the first, or the operating point's with --plan).")):
    """Draw the grid as a heatmap of training size against capacity or regularisation."""
    from gridplan import api
    from gridplan.showing import figures
    axis = "regularization" if axis == "regularisation" else axis   # the other spelling
    run = api.open_run(run_dir, model=model)
    advice = None
    if with_plan:
        from gridplan.deciding.advisor import advise as make_advice
        with _busy("fitting learning curves and planning"):
            advice = make_advice(run_dir, target=target, model=model)
        if model is None and advice["operating_point"]["model"] != run.model_name:
            run = run.for_model(advice["operating_point"]["model"])
    figure = figures.heatmap_figure(run, show=show, axis=axis, capacity=capacity, advice=advice,
                                  target=target)
    named = "" if run.model == 0 else f"{run.model_name}-"
    default = Path(run_dir) / f"heatmap-{named}{axis}-{show}.png"
    api.refuse_run_file(run_dir, output or default, default)
    path = figures.save_figure(figure, output or default)
    typer.echo(f"heatmap written to {path}")


@app.command()
@friendly
def advise(run_dir: Path = typer.Argument(..., help="Run folder."),
           target: Optional[float] = typer.Option(None, "--target", help="Target error (default: the config's)."),
           at: Optional[str] = typer.Option(None, "--at", help="Operating point as CAPACITY,REG labels."),
           confidence: Optional[float] = typer.Option(None, "--confidence", help="Confidence for forecasts."),
           per_sample: Optional[float] = typer.Option(None, "--per-sample", help="Cost of one more labelled row."),
           capacity_step: Optional[float] = typer.Option(None, "--capacity-step", help="Cost of one capacity step."),
           regularization_step: Optional[float] = typer.Option(None, "--regularization-step",
                                                               "--regularisation-step",
                                                               help="Cost of one regularisation step."),
           max_samples: Optional[int] = typer.Option(None, "--max-samples", help="Most training rows ever available."),
           switch_model: Optional[float] = typer.Option(None, "--switch-model",
                                                        help="Cost of switching to another model of the run."),
           model: Optional[str] = typer.Option(None, "--model",
                                               help="Model the operating point belongs to (runs of several models)."),
           boot: int = typer.Option(DEFAULT_BOOT, "--boot", help="Bootstrap resamples per curve."),
           as_json: bool = typer.Option(False, "--json", help="Print JSON instead of text.")):
    """Diagnose bias and variance and plan the cheapest way to the target error."""
    import json

    from gridplan.deciding.advisor import advise as make_advice
    from gridplan.showing.text import render_advice
    with _busy("fitting learning curves and planning"):
        advice = make_advice(run_dir, target=target, at=at, confidence=confidence,
                             per_sample=per_sample, capacity_step=capacity_step,
                             regularization_step=regularization_step, max_samples=max_samples,
                             switch_model=switch_model, model=model, n_boot=boot)
    typer.echo(json.dumps(advice.to_dict(), indent=2) if as_json else render_advice(advice))


@app.command()
@friendly
def report(run_dir: Path = typer.Argument(..., help="Run folder."),
           output: Optional[Path] = typer.Option(None, "-o", "--output", help="HTML file (default RUN_DIR/report.html)."),
           target: Optional[float] = typer.Option(None, "--target", help="Target error (default: the config's)."),
           at: Optional[str] = typer.Option(None, "--at", help="Operating point as CAPACITY,REG labels."),
           confidence: Optional[float] = typer.Option(None, "--confidence"),
           model: Optional[str] = typer.Option(None, "--model",
                                               help="Model of the operating point (runs of several models)."),
           boot: int = typer.Option(DEFAULT_BOOT, "--boot", help="Bootstrap resamples per curve.")):
    """Write one self-contained HTML report: grid, curves, diagnosis, plan and cautions."""
    from gridplan.showing.report import write_report
    with _busy("writing the report"):
        path = write_report(run_dir, output, target=target, confidence=confidence, at=at,
                            n_boot=boot, model=model)
    typer.echo(f"report written to {path}")


@app.command()
@friendly(measures=True)
def backtest(config: Path = typer.Argument(..., help="TOML config file."),
             fraction: float = typer.Option(0.25, "--fraction", help="Share of the training fold the curves may see."),
             out: Optional[Path] = typer.Option(None, "--out", help="Run folder (default outputs/<name>-backtest)."),
             jobs: Optional[int] = typer.Option(None, "--jobs", "-j"),
             as_json: bool = typer.Option(False, "--json", help="Print JSON instead of a table."),
             boot: int = typer.Option(DEFAULT_BOOT, "--boot", help="Bootstrap resamples per curve."),
             allow_any_estimator: bool = typer.Option(False, "--allow-any-estimator")):
    """Forecast the full-size error from a fraction of the data and compare with the truth."""
    import json

    from gridplan import api
    from gridplan.backtest import backtest as run_backtest
    from gridplan.showing.text import render_backtest
    cfg = api.load_config(config)
    quiet = as_json or not sys.stderr.isatty()
    result = run_backtest(cfg, fraction=fraction, out=out, jobs=jobs, n_boot=boot,
                          allow_any_estimator=allow_any_estimator,
                          progress=None if quiet else _stderr_progress())
    typer.echo(json.dumps(result.to_dict(), indent=2) if as_json else render_backtest(result))
    _keep_backtest(api.default_run_dir(cfg), result)


def _keep_backtest(run_dir: Path, result: dict) -> None:
    """Store the backtest beside the main run so that its report can show it."""
    import json

    from gridplan.showing.gather import BACKTEST_FILE
    if (run_dir / "store.sqlite").is_file():
        (run_dir / BACKTEST_FILE).write_text(json.dumps(result.to_dict(), indent=2),
                                             encoding="utf-8")


def _stderr_progress():
    """A minimal progress line on stderr for commands without a spec at hand."""
    def update(done: int, total: int) -> None:
        typer.echo(f"\r  {done}/{total} fits", err=True, nl=done >= total)
    return update


def _demo_summary(cells, noise_floor: float) -> str:
    ok = cells[cells["status"] == "ok"]
    largest = ok["train_size"].max()
    at_full = (ok[ok["train_size"] == largest]
               .groupby(["capacity", "regularization"], sort=False)[["train_error", "validation_error"]]
               .mean().sort_values("validation_error"))
    best = at_full.iloc[0]
    cap, reg = at_full.index[0]
    return (f"best setting at {largest} training rows: degree {cap}, alpha {reg}: "
            f"validation MSE {best['validation_error']:.3f}, training MSE {best['train_error']:.3f} "
            f"(the true noise floor is {noise_floor:.3f})")


def main() -> None:  # pragma: no cover - console entry point
    app()


if __name__ == "__main__":  # pragma: no cover
    main()
