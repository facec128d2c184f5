"""Figures: the data behind each picture (cells, labels, line data), not its pixels."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest

from gridplan import api
from gridplan.common.errors import GridplanError
from gridplan.deciding.gridfit import fit_grid
from gridplan.measuring.store import FoldRow, Store
from gridplan.showing import figures
from tests.helpers import quadratic_data, run_frame

SIZES = [20, 40, 80, 160]
DEGREES = [1, 2, 3]
ALPHAS = [0.001, 1.0, 100.0]
TARGET = 0.4


@pytest.fixture(scope="module")
def grid(tmp_path_factory):
    """A small measured grid: 3 degrees x 3 alphas x 4 sizes, 3 folds."""
    tmp = tmp_path_factory.mktemp("views")
    run_dir, cells = run_frame(tmp, quadratic_data(240, 0.5, seed=3), {
        "data": {"target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"param": "degree", "values": DEGREES},
                  "regularization": {"param": "alpha", "values": ALPHAS}},
        "sizes": {"values": SIZES},
        "resampling": {"folds": 3, "repeats": 1, "seed": 5},
        "goal": {"metric": "mse", "target": TARGET},
    })
    return api.open_run(run_dir), cells


@pytest.fixture(scope="module")
def fits(grid):
    return fit_grid(grid[1], n_boot=10, seed=0)


def cell_means(cells):
    ok = cells[cells["status"] == "ok"]
    return ok.groupby(["capacity_index", "regularization_index", "train_size"])[
        ["train_error", "validation_error"]].mean()


def by_gid(ax, gid):
    found = [a for a in ax.get_children() if a.get_gid() == gid]
    assert found, f"no artist with gid {gid!r}"
    return found


def axes_labelled(figure, label):
    return next(ax for ax in figure.axes if ax.get_label() == label)


def annotation_grid(ax):
    """Cell text keyed by (row, column) from its position at the cell centre."""
    return {(int(t.get_position()[1]), int(t.get_position()[0])): t.get_text()
            for t in ax.texts if t.get_gid() is None and t.get_text()}


# --- heatmaps ---------------------------------------------------------------------------

def test_capacity_heatmap_has_one_cell_and_one_annotation_per_grid_point(grid):
    run, _ = grid
    figure = figures.heatmap_figure(run, target=TARGET)
    ax = axes_labelled(figure, "heatmap")
    mesh = ax.collections[0]
    assert mesh.get_array().shape == (len(DEGREES), len(SIZES))
    assert len(annotation_grid(ax)) == len(DEGREES) * len(SIZES)
    assert [t.get_text() for t in ax.get_xticklabels()] == ["20", "40", "80", "160"]
    assert [t.get_text() for t in ax.get_yticklabels()] == ["1", "2", "3"]
    assert ax.get_xlabel() == "training rows"
    assert ax.get_ylabel() == "capacity (degree)"
    assert "mean squared error" in mesh.colorbar.ax.get_ylabel()
    # the smallest capacity is drawn at the bottom
    assert ax.get_ylim()[0] < ax.get_ylim()[1]


def test_capacity_heatmap_names_the_best_regularization_of_each_cell(grid):
    run, cells = grid
    means = cell_means(cells)["validation_error"]
    texts = annotation_grid(axes_labelled(figures.heatmap_figure(run), "heatmap"))
    for i in range(len(DEGREES)):
        for j, size in enumerate(SIZES):
            column = means.xs((i, size), level=["capacity_index", "train_size"])
            best = int(column.idxmin())
            assert texts[(i, j)] == f"{column[best]:.3g}\nalpha={ALPHAS[best]:g}"


@pytest.mark.parametrize("show", ["validation", "train", "gap"])
def test_heatmap_values_match_the_store(grid, show):
    run, cells = grid
    means = cell_means(cells)
    mesh = axes_labelled(figures.heatmap_figure(run, show=show), "heatmap").collections[0]
    shown = np.asarray(mesh.get_array()).reshape(len(DEGREES), len(SIZES))
    for i in range(len(DEGREES)):
        for j, size in enumerate(SIZES):
            column = means.xs((i, size), level=["capacity_index", "train_size"])
            best = column["validation_error"].idxmin()
            train, validation = column.loc[best, "train_error"], column.loc[best, "validation_error"]
            expected = {"validation": validation, "train": train, "gap": validation - train}[show]
            assert shown[i, j] == pytest.approx(expected, rel=1e-12, abs=1e-15)


def test_regularization_heatmap_for_one_capacity(grid):
    run, cells = grid
    figure = figures.heatmap_figure(run, axis="regularization", capacity="2")
    ax = axes_labelled(figure, "heatmap")
    assert [t.get_text() for t in ax.get_yticklabels()] == ["0.001", "1", "100"]
    assert ax.get_ylabel() == "regularisation (alpha)"
    assert "degree 2" in ax.get_title(loc="left")
    means = cell_means(cells)["validation_error"].xs(1, level="capacity_index")
    shown = np.asarray(ax.collections[0].get_array()).reshape(len(ALPHAS), len(SIZES))
    expected = np.array([[means[(r, m)] for m in SIZES] for r in range(len(ALPHAS))])
    np.testing.assert_allclose(shown, expected, rtol=1e-12)
    texts = annotation_grid(ax)
    assert texts[(2, 0)] == f"{expected[2, 0]:.3g}"


def test_cells_meeting_the_target_are_outlined(grid):
    run, cells = grid
    data = figures.heatmap_data(run)
    target = float(np.nanmedian(data.validation))
    figure = figures.heatmap_figure(run, target=target)
    outlined = by_gid(axes_labelled(figure, "heatmap"), "target-cell")
    expected = {(i, j) for (i, j), v in np.ndenumerate(data.validation) if v <= target}
    assert 0 < len(expected) < data.validation.size
    assert {(round(p.get_y()), round(p.get_x())) for p in outlined} == expected
    notes = axes_labelled(figure, "notes").texts[0].get_text()
    assert f"{len(expected)} cell{'' if len(expected) == 1 else 's'} outlined" in notes


def test_operating_point_and_plan_path_follow_the_advice(grid):
    run, _ = grid
    advice = {  # the advisor's shape: the plan's states under "to", sizes under "size"
        "operating_point": {"capacity": "1", "regularization": "1", "size": 160,
                            "capacity_index": 0, "regularization_index": 1},
        "plan": [
            {"action": "more-capacity", "cost": 100.0, "cumulative_cost": 100.0,
             "predicted_error": 0.31, "to": {"capacity": "2", "regularization": "1", "size": 160}},
            {"action": "more-data", "cost": 480.0, "cumulative_cost": 580.0,
             "predicted_error": 0.27, "to": {"capacity": "2", "regularization": "1", "size": 640}},
        ]}
    figure = figures.heatmap_figure(run, advice=advice)
    ax = axes_labelled(figure, "heatmap")
    dx, dy = figures.ADVICE_OFFSET
    (start,) = by_gid(ax, "operating-point")
    assert (start.get_xdata()[0], start.get_ydata()[0]) == pytest.approx((3.5 + dx, 0.5 + dy))
    (path,) = by_gid(ax, "plan-path")
    # 640 rows is two size steps (x2 each) beyond 160, the last measured column
    np.testing.assert_allclose(path.get_xdata(), np.array([3.5, 3.5, 5.5]) + dx)
    np.testing.assert_allclose(path.get_ydata(), np.array([0.5, 1.5, 1.5]) + dy)
    assert ax.get_xlim()[1] > 5.5 + dx
    assert by_gid(ax, "beyond-grid")
    assert [t.get_text() for t in by_gid(ax, "plan-step")] == ["1", "2"]
    notes = axes_labelled(figure, "notes").texts[0].get_text()
    assert "2. more-data -> degree 2, alpha 1, 640 rows (cost 480, total 580" in notes


def test_plan_steps_on_one_spot_share_a_label(grid):
    run, _ = grid
    advice = {"operating_point": {"capacity_index": 1, "regularization_index": 2, "size": 80},
              "plan": [{"action": "less-regularization", "to": {"regularization": "1"}},
                       {"action": "less-regularization", "to": {"regularization": "0.001"}},
                       {"action": "more-capacity", "to": {"capacity": "3"}}]}
    ax = axes_labelled(figures.heatmap_figure(run, advice=advice), "heatmap")
    assert [t.get_text() for t in by_gid(ax, "plan-step")] == ["1-2", "3"]
    ax = axes_labelled(figures.heatmap_figure(run, axis="regularization", capacity="2",
                                            advice=advice), "heatmap")
    (path,) = by_gid(ax, "plan-path")
    np.testing.assert_allclose(path.get_ydata(), np.array([2.5, 1.5, 0.5]) + figures.ADVICE_OFFSET[1])


def test_failed_rows_are_skipped_and_counted(grid, tmp_path):
    run, cells = grid
    copy = tmp_path / "run"
    shutil.copytree(run.run_dir, copy)
    with Store.open_existing(copy) as store:
        store.write_rows([FoldRow(0, 0, 0, 0, 0, 20, None, None, 0.0, "failed", "plain", "boom")])
    broken = api.open_run(copy)
    data = figures.heatmap_data(broken, axis="regularization", capacity="1")
    assert data.skipped_rows == 1
    assert data.fold_counts[0, 0] == 2
    kept = cells[(cells.capacity_index == 0) & (cells.regularization_index == 0)
                 & (cells.train_size == 20) & (cells.fold != 0)]
    assert data.values[0, 0] == pytest.approx(kept.validation_error.mean())
    notes = axes_labelled(figures.heatmap_figure(broken), "notes").texts[0].get_text()
    assert "1 failed fit skipped" in notes


def test_bad_heatmap_requests_raise_one_sentence(grid):
    run, _ = grid
    with pytest.raises(GridplanError, match="Unknown show value 'bias'"):
        figures.heatmap_figure(run, show="bias")
    with pytest.raises(GridplanError, match="Capacity '7' is not in this grid; choose one of 1, 2, 3"):
        figures.heatmap_figure(run, axis="regularization", capacity="7")
    with pytest.raises(GridplanError, match="Unknown heatmap axis"):
        figures.heatmap_figure(run, axis="size")


# --- learning curves --------------------------------------------------------------------

def lines(ax):
    return {line.get_gid(): line for line in ax.get_lines() if line.get_gid()}


def test_curve_lines_are_the_fold_means_and_the_forecast_is_dashed_beyond_the_data(grid, fits):
    run, cells = grid
    figure = figures.curve_figure(run, fits, ("2", "1"))
    ax = axes_labelled(figure, "curves")
    drawn = lines(ax)
    means = cell_means(cells).xs((1, 1), level=["capacity_index", "regularization_index"])
    np.testing.assert_allclose(drawn["validation-mean"].get_xdata(), SIZES)
    np.testing.assert_allclose(drawn["validation-mean"].get_ydata(), means["validation_error"])
    np.testing.assert_allclose(drawn["train-mean"].get_ydata(), means["train_error"])
    forecast = drawn["forecast"]
    assert forecast.get_linestyle() == "--"
    assert drawn["validation-mean"].get_linestyle() == "-"
    x = np.asarray(forecast.get_xdata())
    assert x.min() == pytest.approx(160) and x.max() == pytest.approx(4 * 160)
    fit = fits[(1, 1)]
    np.testing.assert_allclose(forecast.get_ydata(), fit.predict(x))
    assert drawn["plateau"].get_ydata()[0] == pytest.approx(fit.asymptote)
    assert drawn["target"].get_ydata()[0] == pytest.approx(TARGET)
    assert ax.get_xscale() == "log"
    assert ax.get_ylabel() == "mean squared error"


def test_fold_bands_span_the_lowest_and_highest_fold(grid, fits):
    run, cells = grid
    ax = axes_labelled(figures.curve_figure(run, fits, (0, 2)), "curves")
    (band,) = by_gid(ax, "validation-folds")
    ok = cells[(cells.capacity_index == 0) & (cells.regularization_index == 2)]
    spread = ok.groupby("train_size")["validation_error"].agg(["min", "max"])
    vertices = band.get_paths()[0].vertices
    for size, (low, high) in spread.iterrows():
        at = vertices[np.isclose(vertices[:, 0], size)][:, 1]
        assert at.min() == pytest.approx(low) and at.max() == pytest.approx(high)
    (forecast_band,) = by_gid(ax, "forecast-band")
    assert forecast_band.get_paths()[0].vertices[:, 0].min() == pytest.approx(160)


def test_curve_without_a_fit_draws_the_measurements_and_says_so(grid):
    run, _ = grid
    ax = axes_labelled(figures.curve_figure(run, {}, ("3", "100"), target=None), "curves")
    assert {"train-mean", "validation-mean"} <= set(lines(ax))
    assert "forecast" not in lines(ax)
    assert "no curve fitted" in ax.get_title(loc="left")


def test_unknown_setting_raises(grid, fits):
    run, _ = grid
    with pytest.raises(GridplanError, match="Regularization '0.5' is not in this grid"):
        figures.curve_figure(run, fits, ("2", "0.5"))
    with pytest.raises(GridplanError, match="capacity index 9 is outside the grid"):
        figures.curve_figure(run, fits, (9, 0))


def test_small_multiples_show_the_best_regularization_per_capacity(grid, fits):
    run, cells = grid
    at_largest = cell_means(cells)["validation_error"].xs(160, level="train_size")
    expected = [(c, int(at_largest.xs(c, level="capacity_index").idxmin())) for c in range(3)]
    assert figures.small_multiples_settings(run) == expected
    figure = figures.small_multiples_figure(run, fits)
    panels = [ax for ax in figure.axes if ax.get_visible() and ax.get_label().startswith("panel")]
    assert [ax.get_title().split("\n")[0] for ax in panels] == [
        f"degree {c + 1}, alpha {ALPHAS[r]:g}" for c, r in expected]
    assert len({ax.get_ylim() for ax in panels}) == 1
    # more capacities than panels: evenly spaced, first and last always kept
    assert [c for c, _ in figures.small_multiples_settings(run, max_panels=2)] == [0, 2]
    two = figures.small_multiples_figure(run, fits, max_panels=2)
    assert sum(ax.get_visible() for ax in two.axes) == 2


# --- saving ----------------------------------------------------------------------------

def test_save_by_extension_and_embedding_helpers(grid, tmp_path):
    run, _ = grid
    figure = figures.heatmap_figure(run, show="gap")
    png = figures.save_figure(figure, tmp_path / "out" / "map.png", dpi=40)
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    svg = figures.save_figure(figure, tmp_path / "map.SVG")
    assert "<svg" in svg.read_text(encoding="utf-8")
    assert figures.figure_to_png_bytes(figure, dpi=40)[:4] == b"\x89PNG"
    text = figures.figure_to_svg_text(figure)
    assert text.lstrip().startswith("<?xml") and "<dc:date>" not in text


def test_bad_output_paths_raise_one_sentence(grid, tmp_path):
    run, _ = grid
    figure = figures.heatmap_figure(run)
    with pytest.raises(GridplanError, match=r"ending in \.png or \.svg"):
        figures.save_figure(figure, tmp_path / "map.jpg")
    blocker = tmp_path / "file.txt"
    blocker.write_text("not a folder")
    with pytest.raises(GridplanError, match="Cannot write"):
        figures.save_figure(figure, blocker / "map.png")


def test_an_interrupted_save_leaves_the_old_picture_and_no_half_file(grid, tmp_path, monkeypatch):
    run, _ = grid
    figure = figures.heatmap_figure(run)
    path = figures.save_figure(figure, tmp_path / "map.png", dpi=40)
    before = path.read_bytes()

    def half_then_stop(target, **kwargs):
        Path(target).write_bytes(b"\x89PNG half")
        raise KeyboardInterrupt
    monkeypatch.setattr(figure, "savefig", half_then_stop)
    with pytest.raises(KeyboardInterrupt):
        figures.save_figure(figure, path)
    assert path.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["map.png"]


def test_regularisation_labels_in_cells_are_shortened_only_where_they_stay_apart():
    assert figures._compact_labels(["1e-06", "0.0811131", "0.53367", "1000"]) == [
        "1e-06", "0.0811", "0.534", "1e+03"]
    assert figures._compact_labels(["0.10001", "0.10002"]) == ["0.10001", "0.10002"]
    assert figures._compact_labels(["none", "l2"]) == ["none", "l2"]
