"""The HTML report: structure, numbers equal to the advisor's, no external URLs, escaping, rendering."""

from __future__ import annotations

import base64
import html
import json
import shutil
import sqlite3
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from gridplan import api
from gridplan.backtest import backtest
from gridplan.common.errors import GridplanError
from gridplan.common.wording import money, sig
from gridplan.deciding.advisor import advise
from gridplan.measuring.config import load_config
from gridplan.measuring.store import FoldRow, Store
from gridplan.showing.gather import BACKTEST_FILE, read_backtest
from gridplan.showing.report import REPORT_NAME, write_report

N_BOOT = 10
TARGET = 0.3
AT = "x,0.001"  # start from the smaller feature set, so the plan has a step

HOSTILE_TARGET = "<script>alert(1)</script>"
HOSTILE_FEATURE = "<img src=x onerror=alert(2)>"
HOSTILE_RUN = "<img src=y onerror=alert(3)>"
HOSTILE_FILE = "crops<i onmouseover=alert(4)>.csv"
HOSTILE_MESSAGE = "<script>alert(5)</script> & 'quoted'"

MAIN_SECTIONS = ["job", "diagnosis", "plan", "actions", "maps", "curves", "settings", "backtest",
                 "skipped", "cautions"]
VOID_TAGS = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source",
             "track", "wbr"}
URL_ATTRIBUTES = {"src", "href", "srcset", "data", "action", "poster", "xlink:href", "background"}


class Collector(HTMLParser):
    """Collects tags, nesting mistakes, and the text inside every element that has an id."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.stack: list[tuple[str, str | None]] = []
        self.errors: list[str] = []
        self.text_by_id: dict[str, str] = {}
        self.attrs_by_id: dict[str, dict] = {}
        self.parent_of_section: dict[str, str] = {}
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs) -> None:
        attributes = dict(attrs)
        self.tags.append((tag, attributes))
        ident = attributes.get("id")
        if ident is not None:
            self.attrs_by_id[ident] = attributes
            self.text_by_id.setdefault(ident, "")
        if tag == "section":
            self.parent_of_section[ident] = self.stack[-1][0] if self.stack else ""
        if tag not in VOID_TAGS:
            self.stack.append((tag, ident))

    def handle_startendtag(self, tag: str, attrs) -> None:
        self.tags.append((tag, dict(attrs)))

    def handle_endtag(self, tag: str) -> None:
        if tag in VOID_TAGS:
            return
        if not self.stack or self.stack[-1][0] != tag:
            self.errors.append(f"</{tag}> closes {self.stack[-1][0] if self.stack else 'nothing'}")
            return
        self.stack.pop()

    def handle_data(self, data: str) -> None:
        self.text.append(data)
        for _, ident in self.stack:
            if ident is not None:
                self.text_by_id[ident] += data


def parse(text: str) -> Collector:
    collector = Collector()
    collector.feed(text)
    collector.close()
    return collector


def section_tables(text: str, section: str) -> list[list[list[str]]]:
    """Body rows (cell texts) of every table inside one section."""
    start = text.index(f'<section id="{section}"')
    end = text.index("</section>", start)
    tables = []
    for chunk in text[start:end].split("<tbody>")[1:]:
        body = chunk.split("</tbody>")[0]
        rows = []
        for row in body.split("<tr")[1:]:
            cells = [html.unescape(c.split("</td>")[0].split(">", 1)[1]) for c in row.split("<td")[1:]]
            rows.append(cells)
        tables.append(rows)
    return tables


def write_grid(folder: Path, target: float | None = TARGET) -> Path:
    """Data and config whose names are hostile strings; returns the config path."""
    rng = np.random.default_rng(11)
    n = 240
    x = rng.uniform(-2, 2, n)
    z = rng.normal(size=n)
    y = 1 + x - 0.8 * z + 0.6 * x ** 2 + rng.normal(scale=0.5, size=n)
    pd.DataFrame({"x": x, HOSTILE_FEATURE: z, HOSTILE_TARGET: y}).to_csv(folder / HOSTILE_FILE,
                                                                        index=False)
    q = json.dumps  # TOML basic strings accept these JSON strings unchanged
    goal = f"[goal]\ntarget = {target}\n" if target is not None else ""
    text = (f"[data]\npath = {q(HOSTILE_FILE)}\ntarget = {q(HOSTILE_TARGET)}\n\n"
            f"[model]\nfamily = \"poly-ridge\"\nparams = {{ degree = 2 }}\n"
            f"capacity = {{ features = [[\"x\"], [\"x\", {q(HOSTILE_FEATURE)}]] }}\n"
            f"regularization = {{ param = \"alpha\", values = [0.001, 1.0, 100.0] }}\n\n"
            f"[sizes]\nvalues = [20, 40, 80, 160]\n\n[resampling]\nfolds = 3\nseed = 5\n\n{goal}\n"
            f"[costs]\nper_sample = 0.5\ncapacity_step = 50\nmax_samples = 5000\n"
            f"feature_groups = {{ {q('+' + HOSTILE_FEATURE)} = 300 }}\n\n"
            f"[run]\nname = {q(HOSTILE_RUN)}\n")
    path = folder / "grid.toml"
    path.write_text(text, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def grid(tmp_path_factory):
    """One small measured grid: 2 feature sets x 3 alphas x 4 sizes, 3 folds, hostile names."""
    tmp = tmp_path_factory.mktemp("report")
    config_path = write_grid(tmp)
    run_dir = api.run(load_config(config_path), out=tmp / "run", jobs=1)
    return tmp, config_path, run_dir


@pytest.fixture(scope="module")
def report(grid):
    """The report of the grid from the smaller feature set, and the advisor's dict for the same inputs."""
    _, _, run_dir = grid
    path = write_report(run_dir, at=AT, n_boot=N_BOOT, seed=0)
    fits = api.fit_curves(run_dir, n_boot=N_BOOT, seed=0)
    advice = advise(run_dir, at=AT, n_boot=N_BOOT, seed=0, curves=fits)
    return path, path.read_text(encoding="utf-8"), advice


@pytest.fixture(scope="module")
def variant(grid, tmp_path_factory):
    """A copy of the run without a target, with failed fits and a real backtest stored beside it."""
    tmp, config_path, run_dir = grid
    copy = tmp_path_factory.mktemp("variant") / "run"
    shutil.copytree(run_dir, copy)
    config_copy = copy / "config.toml"
    config_copy.write_text("\n".join(line for line in config_copy.read_text().splitlines()
                                     if not line.startswith("target = 0")), encoding="utf-8")
    with Store.open_existing(copy) as store:
        store.write_rows([FoldRow(0, 2, 0, 0, fold, 20, None, None, 0.0, "failed", "plain",
                                  HOSTILE_MESSAGE) for fold in range(3)])
    result = backtest(load_config(config_path), fraction=0.5, out=tmp / "backtest", jobs=1,
                      n_boot=N_BOOT, seed=0)
    (copy / BACKTEST_FILE).write_text(json.dumps(result.to_dict()), encoding="utf-8")
    path = write_report(copy, copy / "shared" / "view.html", n_boot=N_BOOT, seed=0)
    return path, path.read_text(encoding="utf-8"), result


# --- structure and numbers ------------------------------------------------------------------------

def test_report_is_balanced_html_with_every_section(report):
    path, text, _ = report
    assert path.name == REPORT_NAME and path.parent.name == "run"
    assert text.startswith("<!DOCTYPE html>")
    doc = parse(text)
    assert doc.errors == []
    assert doc.stack == []
    assert list(doc.parent_of_section) == ["glance"] + MAIN_SECTIONS
    assert all(parent == "main" for parent in doc.parent_of_section.values())
    for ident in MAIN_SECTIONS:
        assert doc.text_by_id[ident].strip(), f"section {ident} is empty"


def test_verdict_plan_and_actions_equal_the_advisors(report):
    _, text, advice = report
    doc = parse(text)
    assert advice["plan"], "the fixture is meant to need a plan"
    assert doc.attrs_by_id["verdict"]["data-value"] == advice["verdict"]
    assert doc.text_by_id["headline"].strip() == advice["headline"]      # the same sentence first
    assert advice["verdict_reason"] in doc.text_by_id["diagnosis"]
    assert float(doc.attrs_by_id["plan-total"]["data-value"]) == advice["plan_cost"]
    assert money(advice["plan_cost"]) in doc.text_by_id["plan-total"]
    assert money(advice["plan_cost"]) in doc.text_by_id["tile-plan-cost"]
    assert advice["verdict"] in doc.text_by_id["tile-verdict"]
    plan_rows = section_tables(text, "plan")[0]
    assert len(plan_rows) == len(advice["plan"])
    for row, step in zip(plan_rows, advice["plan"]):
        assert row[1] == step["action"]
        assert row[4] == money(step["cost"])
        assert row[5] == money(step["cumulative_cost"])
    action_rows = section_tables(text, "actions")[0]
    assert [r[1] for r in action_rows] == [a["action"] for a in advice["actions"]]
    diagnosis = doc.text_by_id["diagnosis"]
    d = advice["diagnosis"]
    assert f"{sig(d['train_error'])} (mean over {d['units']} folds)" in diagnosis
    assert f"{sig(d['validation_error'])} (target {advice['target']:g})" in diagnosis
    gap = d["gap_test"]
    assert (f"{sig(gap['mean'])}, 90% interval [{sig(gap['low'])}, {sig(gap['high'])}]; "
            f"t = {sig(gap['t'])} on {gap['dof']} df, one-sided p = {gap['p_value']:.2g}") in diagnosis
    if advice["noise_floor"] is not None:
        low, high = advice["noise_floor_band"]
        assert f"{sig(advice['noise_floor'])} [{sig(low)}, {sig(high)}]" in diagnosis
    else:   # unknown floor: the report states the plateau the JSON gives instead
        low, high = advice["plateau_band"]
        assert "unknown: no converged settings" in diagnosis
        assert f"{sig(advice['plateau'])} [{sig(low)}, {sig(high)}]" in diagnosis


def test_settings_table_has_one_row_per_measured_setting(report, grid):
    _, text, advice = report
    cells = api.open_run(grid[2]).cells()
    rows = section_tables(text, "settings")[0]
    assert len(rows) == cells.groupby(["capacity_index", "regularization_index"]).ngroups == 6
    validation = [float(r[4]) for r in rows]
    assert validation == sorted(validation)
    verdicts = {(s["capacity"], s["regularization"]): s["verdict"] for s in advice["settings"]}
    assert {(r[0], r[1]): r[6] for r in rows} == verdicts


def test_figures_drawn_side_by_side_give_the_same_page(variant, forking):
    # Figures are drawn on every core by default; one at a time is the reference.
    from gridplan.showing.gather import gather_inputs
    from gridplan.showing.report import report_html
    run_dir = variant[0].parent.parent       # the copy with a backtest and a failed fit
    inputs = gather_inputs(run_dir, n_boot=N_BOOT, seed=0)
    one = report_html(inputs, jobs=1)
    assert forking == []
    two = report_html(inputs, jobs=2)
    assert forking == [True]                 # drawn in children
    assert one == two
    assert "gridplan-figure" not in one and one.count("<img") == 6     # five maps and curves, the backtest


def test_images_are_embedded_pngs(report):
    _, text, _ = report
    images = [a for t, a in parse(text).tags if t == "img"]
    # validation and gap maps, the regularisation map, one curve, the small multiples
    assert len(images) == 5
    for attributes in images:
        prefix = "data:image/png;base64,"
        assert attributes["src"].startswith(prefix)
        assert base64.b64decode(attributes["src"][len(prefix):])[:8] == b"\x89PNG\r\n\x1a\n"
        assert attributes["alt"]


def test_no_external_urls_no_scripts_no_event_handlers(report, variant):
    for text in (report[1], variant[1]):
        doc = parse(text)
        names = {tag for tag, _ in doc.tags}
        assert not names & {"script", "link", "iframe", "object", "embed", "base", "frame"}
        for tag, attributes in doc.tags:
            for name, value in attributes.items():
                assert not name.startswith("on"), (tag, name)
                if name in URL_ATTRIBUTES:
                    assert value.startswith("data:") or value.startswith("#"), (tag, name, value[:60])
        lowered = text.lower()
        assert "http:" not in lowered and "https:" not in lowered and "file:" not in lowered
        style = text[text.index("<style>"):text.index("</style>")]
        assert "url(" not in style and "@import" not in style


def test_cautions_are_there(report):
    cautions = parse(report[1]).text_by_id["cautions"]
    assert "extrapolation" in cautions
    assert "not a guarantee" in cautions
    assert "measured on this data set" in cautions


# --- escaping --------------------------------------------------------------------------------------

@pytest.mark.parametrize("hostile", [HOSTILE_TARGET, HOSTILE_FEATURE, HOSTILE_RUN, HOSTILE_FILE])
def test_hostile_names_come_out_escaped(report, hostile):
    _, text, _ = report
    assert hostile not in text
    assert html.escape(hostile, quote=True) in text
    # and the reader sees the name itself, as text
    assert hostile in "".join(parse(text).text)


def test_hostile_failure_message_is_escaped_and_noted(variant):
    _, text, _ = variant
    assert HOSTILE_MESSAGE not in text
    assert html.escape(HOSTILE_MESSAGE, quote=True) in text
    skipped = parse(text).text_by_id["skipped"]
    assert "3 of" in skipped and "fold fits failed" in skipped
    row = section_tables(text, "skipped")[0][0]
    assert row[1] == "100" and row[2] == "3" and row[4] == HOSTILE_MESSAGE


# --- without a target, with a backtest ----------------------------------------------------------------

def test_without_a_target_the_report_says_why_and_has_no_plan(variant):
    path, text, _ = variant
    assert path.name == "view.html" and path.parent.name == "shared"
    doc = parse(text)
    assert doc.errors == [] and doc.stack == []
    assert "actions" not in doc.parent_of_section
    assert "no target error is set" in doc.text_by_id["plan"]
    assert "no target error is set" in doc.text_by_id["glance"]
    assert "plan-total" not in doc.attrs_by_id
    assert "none" in doc.text_by_id["tile-verdict"]
    assert len([a for t, a in doc.tags if t == "img"]) == 6  # five views and the backtest


def test_backtest_is_shown_with_its_numbers(variant):
    _, text, result = variant
    doc = parse(text)
    assert float(doc.attrs_by_id["backtest-summary"]["data-value"]) == result["median_abs_rel_error"]
    assert f"{result['coverage']:.0%}" in doc.text_by_id["backtest-summary"]
    rows = section_tables(text, "backtest")[0]
    assert len(rows) == len(result["rows"])
    for row, r in zip(rows, result["rows"]):
        assert row[4] == f"{r['measured']:.3g}"
        assert row[6] == ("yes" if r["inside_band"] else "no")


def test_unreadable_backtest_file_is_noted_not_fatal(tmp_path):
    assert read_backtest(tmp_path) == (None, None)
    (tmp_path / BACKTEST_FILE).write_text("{not json", encoding="utf-8")
    result, note = read_backtest(tmp_path)
    assert result is None and "could not be read" in note
    good = {"rows": [{"predicted": 1.0, "low": 0.8, "high": 1.2, "measured": 1.1, "rel_error": 0.1}],
            "coverage": 1.0, "full_size": 160, "fitted_sizes": [20, 40]}
    for broken in ({"rows": [{"predicted": "a"}]}, {**good, "coverage": "most"},
                   {**good, "fitted_sizes": "20,40"}, {**good, "rows": []}, [good]):
        (tmp_path / BACKTEST_FILE).write_text(json.dumps(broken), encoding="utf-8")
        result, note = read_backtest(tmp_path)
        assert result is None and "does not hold a backtest result" in note
    (tmp_path / BACKTEST_FILE).write_text(json.dumps(good), encoding="utf-8")
    assert read_backtest(tmp_path) == (good, None)


# --- bad input -----------------------------------------------------------------------------------------

def test_bad_output_paths_are_refused(grid, tmp_path):
    _, _, run_dir = grid
    with pytest.raises(GridplanError, match="it is a folder"):
        write_report(run_dir, tmp_path, n_boot=N_BOOT)
    blocker = tmp_path / "a-file"
    blocker.write_text("x")
    with pytest.raises(GridplanError, match="cannot create the folder for the report"):
        write_report(run_dir, blocker / "report.html", n_boot=N_BOOT)


def test_folders_without_finished_fits_are_refused(grid, tmp_path):
    with pytest.raises(GridplanError, match="not a gridplan run folder"):
        write_report(tmp_path, n_boot=N_BOOT)
    copy = tmp_path / "run"
    shutil.copytree(grid[2], copy, ignore=shutil.ignore_patterns(REPORT_NAME))
    with sqlite3.connect(copy / "store.sqlite") as connection:
        connection.execute("UPDATE folds SET status = 'failed'")
    with pytest.raises(GridplanError, match="holds no finished fits yet"):
        write_report(copy, n_boot=N_BOOT)
    assert not (copy / REPORT_NAME).exists()


def test_bad_target_is_refused(grid, tmp_path):
    with pytest.raises(GridplanError, match="target must be a positive error"):
        write_report(grid[2], tmp_path / "r.html", target=-1.0, n_boot=N_BOOT)
    with pytest.raises(GridplanError, match="names no setting"):
        write_report(grid[2], tmp_path / "r.html", at="nope,1", n_boot=N_BOOT)


# --- rendering ------------------------------------------------------------------------------------------

def test_chromium_renders_a_page_that_is_not_blank(report, tmp_path):
    import matplotlib.image

    binary = shutil.which("chromium") or shutil.which("chromium-browser")
    if binary is None:
        pytest.skip("Chromium is not installed (Debian: apt-get install chromium chromium-driver)")
    path = report[0]
    shot = tmp_path / "shot.png"
    subprocess.run([binary, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
                    "--disable-background-networking", "--disable-component-update",
                    "--disable-sync", "--disable-dev-shm-usage", f"--user-data-dir={tmp_path / 'profile'}",
                    f"--screenshot={shot}", "--window-size=1200,2000", path.resolve().as_uri()],
                   capture_output=True, timeout=60, check=False)
    assert shot.is_file(), "Chromium wrote no screenshot"
    pixels = matplotlib.image.imread(shot)[..., :3]
    assert pixels.shape[:2] == (2000, 1200)
    assert float(pixels.std()) > 0.05
    channels = (pixels.reshape(-1, 3) * 255).round().astype(np.int64)
    colours = np.unique(channels[:, 0] << 16 | channels[:, 1] << 8 | channels[:, 2])
    assert len(colours) > 50
    # the page is mostly light paper with dark text: plenty of both
    lightness = pixels.mean(axis=2)
    assert (lightness > 0.9).mean() > 0.4 and (lightness < 0.4).mean() > 0.005


def test_without_a_target_the_settings_table_drops_target_columns(variant):
    _, text, _ = variant
    start = text.index('<section id="settings"')
    head = text[start:text.index("</thead>", start)]
    assert "verdict" not in head and "rows for the target" not in head
    assert len(section_tables(text, "settings")[0][0]) == 9


def test_the_page_template_escapes_every_field_that_is_not_built_markup():
    from gridplan.showing.markup import Markup, render_page
    page = render_page(title="<script>x</script>", style=Markup("b{}"), masthead="a & b",
                       glance=Markup("<p>ok</p>"), sections="", footer="")
    assert "&lt;script&gt;x&lt;/script&gt;" in page and "<script>" not in page
    assert "a &amp; b" in page and "<p>ok</p>" in page and "<style>b{}</style>" in page


def test_costs_have_decimals_only_when_they_are_not_whole():
    # common practice, no published source: whole amounts read best without ".00"
    assert money(14440) == "14,440" and money(250.0) == "250"
    assert money(2.5) == "2.50" and money(1234.567) == "1,234.57"
    assert money(None) == "-" and money(None, missing="–") == "–"


def test_every_verdict_has_words_in_the_report():
    # The report names each verdict the diagnosis can give, and no other.
    from gridplan.deciding.diagnosis import VERDICTS
    from gridplan.showing.report import VERDICT_WORDS
    assert set(VERDICT_WORDS) == set(VERDICTS)
