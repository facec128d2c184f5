"""Faults: killed runs, Ctrl-C, hung fits, a second run on the same folder, a full disk."""

from __future__ import annotations

import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest

from gridplan import api
from gridplan.api import run_lock
from gridplan.common.errors import GridplanError
from gridplan.measuring.config import load_config
from gridplan.measuring.store import Store
from tests.helpers import linear_data, without_times, write_config

ROOT = Path(__file__).resolve().parents[1]


def _slow_grid(tmp_path) -> Path:
    """A plain-path grid of a few hundred quick fits (seconds in all)."""
    linear_data(600, 3, 0.5, seed=9).to_csv(tmp_path / "data.csv", index=False)
    return write_config(tmp_path, {
        "data": {"path": "data.csv", "target": "y"},
        "model": {"family": "tree", "capacity": {"values": [1, 2, 4, 8]},
                  "regularization": {"param": "ccp_alpha", "values": [0.0, 0.01]}},
        "sizes": {"values": [30, 60, 120, 240, 480]},
        "resampling": {"folds": 5, "repeats": 2, "seed": 5}})


def _start_run(config: Path, out: Path) -> subprocess.Popen:
    return subprocess.Popen(
        [sys.executable, "-m", "gridplan", "run", str(config), "--out", str(out), "-j", "1",
         "--yes", "-q"], cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _rows(out: Path) -> int:
    path = out / "store.sqlite"
    if not path.exists():
        return 0
    try:
        with sqlite3.connect(path, timeout=5) as connection:
            return connection.execute("SELECT COUNT(*) FROM folds").fetchone()[0]
    except sqlite3.OperationalError:
        return 0


def _wait_for_rows(process: subprocess.Popen, out: Path, at_least: int) -> None:
    deadline = time.monotonic() + 120
    while _rows(out) < at_least:
        assert process.poll() is None, process.stderr.read()
        assert time.monotonic() < deadline, "the run wrote no rows"
        time.sleep(0.05)


def test_sigkill_then_rerun_equals_an_uninterrupted_run(tmp_path):
    # Common practice, no published source: a killed run must lose nothing it committed.
    config = _slow_grid(tmp_path)
    process = _start_run(config, tmp_path / "killed")
    _wait_for_rows(process, tmp_path / "killed", 50)
    process.send_signal(signal.SIGKILL)
    process.wait(timeout=30)
    with Store.open_existing(tmp_path / "killed") as store:
        assert store.integrity_ok()
        partial = len(store.fold_rows())
    assert 0 < partial < 4 * 2 * 5 * 10
    api.run(load_config(config), out=tmp_path / "killed", jobs=1)
    api.run(load_config(config), out=tmp_path / "whole", jobs=1)
    resumed = api.open_run(tmp_path / "killed").cells()
    whole = api.open_run(tmp_path / "whole").cells()
    pd.testing.assert_frame_equal(without_times(resumed), without_times(whole))
    keys = ["capacity_index", "regularization_index", "size_index", "repeat", "fold"]
    assert not resumed.duplicated(keys).any() and len(resumed) == 4 * 2 * 5 * 10
    with Store.open_existing(tmp_path / "killed") as store:
        assert store.integrity_ok()


def test_ctrl_c_stops_keeps_cells_and_says_how_to_resume(tmp_path):
    config = _slow_grid(tmp_path)
    process = _start_run(config, tmp_path / "run")
    _wait_for_rows(process, tmp_path / "run", 20)
    process.send_signal(signal.SIGINT)
    _, stderr = process.communicate(timeout=30)
    assert process.returncode == 130
    assert "Run the same command again to resume" in stderr
    assert "Traceback" not in stderr
    assert _rows(tmp_path / "run") >= 20


def test_hung_fit_is_stopped_by_the_time_limit(tmp_path):
    linear_data(120, 2, 0.5, seed=1).to_csv(tmp_path / "data.csv", index=False)
    config = write_config(tmp_path, {
        "data": {"path": "data.csv", "target": "y"},
        "model": {"estimator": "tests.sleepy.SleepyRegressor",
                  "capacity": {"param": "nap", "values": [0.0, 30.0]}},
        "sizes": {"values": [30, 60]}, "resampling": {"folds": 2},
        "run": {"fit_time_limit": 0.3}})
    started = time.monotonic()
    run_dir = api.run(load_config(config), out=tmp_path / "run", jobs=1, allow_any_estimator=True)
    assert time.monotonic() - started < 25   # far below one 30 s nap: the hang was cut short
    cells = api.open_run(run_dir).cells()
    hung, quick = cells[cells.capacity == "30"], cells[cells.capacity == "0"]
    assert len(hung) == 4 and len(quick) == 4
    assert (hung.status == "failed").all()
    assert hung.message.str.contains("time limit").all()
    assert (quick.status == "ok").all()


def test_second_run_on_the_same_folder_is_refused(tmp_path):
    config = load_config(_slow_grid(tmp_path))
    (tmp_path / "run").mkdir()
    with run_lock(tmp_path / "run"):
        with pytest.raises(GridplanError, match="another gridplan run is using"):
            api.run(config, out=tmp_path / "run", jobs=1)


def test_full_disk_gives_a_clear_error_and_keeps_committed_rows(tmp_path, monkeypatch):
    config = load_config(_slow_grid(tmp_path))
    calls = {"n": 0}
    original = Store.write_rows

    def fill_up_after_two_writes(self, rows):
        calls["n"] += 1
        if calls["n"] > 2:
            raise sqlite3.OperationalError("database or disk is full")
        return original(self, rows)

    monkeypatch.setattr("gridplan.measuring.runner.FLUSH_ROWS", 10)
    monkeypatch.setattr(Store, "write_rows", fill_up_after_two_writes)
    with pytest.raises(sqlite3.OperationalError):
        api.run(config, out=tmp_path / "run", jobs=1)
    monkeypatch.undo()
    with Store.open_existing(tmp_path / "run") as store:
        assert store.integrity_ok()
        kept = store.fold_rows()
    assert len(kept) >= 10 and kept["status"].eq("ok").all()


def test_store_write_error_becomes_one_sentence(tmp_path):
    store = Store(tmp_path / "s.sqlite")
    store.connection.execute("PRAGMA query_only = ON")
    from gridplan.measuring.store import FoldRow
    row = FoldRow(0, 0, 0, 0, 0, 10, 0.1, 0.2, 0.01, "ok", "plain")
    with pytest.raises(GridplanError, match="cannot write to the store"):
        store.write_rows([row])


def test_unwritable_output_folder_is_a_clear_error(tmp_path):
    config = load_config(_slow_grid(tmp_path))
    blocker = tmp_path / "file"
    blocker.write_text("not a folder")
    with pytest.raises(GridplanError, match="cannot create run folder"):
        api.run(config, out=blocker / "run", jobs=1)


# -- round 2: export never loses the store, silent schedulers time out -------

def _small_run(tmp_path) -> Path:
    linear_data(120, 2, 0.5, seed=1).to_csv(tmp_path / "data.csv", index=False)
    config = write_config(tmp_path, {
        "data": {"path": "data.csv", "target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 2]}},
        "sizes": {"values": [30, 60]}, "resampling": {"folds": 3}})
    return api.run(load_config(config), out=tmp_path / "run", jobs=1)


def _export(*args: str):
    from typer.testing import CliRunner

    from gridplan.cli import app
    return CliRunner().invoke(app, ["export", *map(str, args)])


def test_export_refuses_the_run_folders_own_files_even_with_force(tmp_path):
    run_dir = _small_run(tmp_path)
    own = {name: (run_dir / name).read_bytes() for name in ("store.sqlite", "config.toml")}
    (tmp_path / "alias").symlink_to(run_dir / "store.sqlite")
    targets = [run_dir / "store.sqlite", run_dir / "config.toml", run_dir / "run.lock",
               run_dir / ".." / "run" / "store.sqlite", tmp_path / "alias"]
    for target in targets:
        for extra in ((), ("--force",)):
            result = _export(run_dir, "-o", target, *extra)
            assert result.exit_code == 1, result.output
            assert "is the run folder's own" in result.output and "Traceback" not in result.output
    for name, content in own.items():
        assert (run_dir / name).read_bytes() == content    # byte-identical
    assert len(api.open_run(run_dir).cells()) == 4 * 3


def test_export_replaces_only_its_own_earlier_exports_without_force(tmp_path):
    run_dir = _small_run(tmp_path)
    out = tmp_path / "cells.csv"
    assert _export(run_dir, "-o", out).exit_code == 0
    first = pd.read_csv(out)
    assert len(first) == 4 * 3
    assert _export(run_dir, "-o", out).exit_code == 0       # its own export: replaced
    notes = tmp_path / "notes.csv"
    notes.write_text("my own notes\n")
    result = _export(run_dir, "-o", notes)
    assert result.exit_code == 1 and "already exists and is not an earlier export" in result.output
    assert notes.read_text() == "my own notes\n"
    assert _export(run_dir, "-o", notes, "--force").exit_code == 0
    pd.testing.assert_frame_equal(pd.read_csv(notes), first)
    out.write_text("edited by hand\n")                      # changed since: no longer ours
    assert _export(run_dir, "-o", out).exit_code == 1


def test_export_into_a_missing_folder_names_the_folder(tmp_path):
    run_dir = _small_run(tmp_path)
    result = _export(run_dir, "-o", tmp_path / "nowhere" / "cells.csv")
    assert result.exit_code == 1
    assert f"the folder {tmp_path / 'nowhere'} does not exist" in result.output
    assert "None" not in result.output


def test_a_failed_export_leaves_no_half_file(tmp_path, monkeypatch):
    run_dir = _small_run(tmp_path)

    def write_half_then_fail(self, path, **kwargs):
        Path(path).write_text("x0,x1\n1,")
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(pd.DataFrame, "to_csv", write_half_then_fail)
    with pytest.raises(GridplanError, match="No space left on device"):
        api.export_cells(run_dir, tmp_path / "cells.csv")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["data.csv", "grid.toml", "run"]


def test_a_scheduler_that_accepts_but_never_answers_fails_in_one_sentence(tmp_path, monkeypatch):
    import socket
    import threading

    from gridplan.measuring import cluster
    monkeypatch.setattr(cluster, "CONNECT_TIMEOUT", 1.0)
    listener = socket.socket()
    listener.bind(("127.0.0.1", 0))
    listener.listen(4)
    accepted = []
    threading.Thread(target=lambda: accepted.append(listener.accept()), daemon=True).start()
    address = f"tcp://127.0.0.1:{listener.getsockname()[1]}"
    config = load_config(_slow_grid(tmp_path))
    try:
        with pytest.raises(GridplanError, match="cannot reach the dask scheduler at") as caught:
            api.run(config, out=tmp_path / "run", scheduler=address)
    finally:
        listener.close()
    assert address in str(caught.value) and accepted    # it did accept the connection


def test_report_and_figures_never_replace_the_run_folders_own_files(tmp_path):
    from typer.testing import CliRunner

    from gridplan.cli import app
    run_dir = _small_run(tmp_path)
    before = (run_dir / "store.sqlite").read_bytes()
    for args in (["report", str(run_dir), "-o", str(run_dir / "store.sqlite"), "--target", "0.5"],
                 ["heatmap", str(run_dir), "-o", str(run_dir / "store.sqlite")],
                 ["curves", str(run_dir), "--plot", "-o", str(run_dir / "config.toml")]):
        result = CliRunner().invoke(app, args)
        assert result.exit_code == 1, result.output
        assert "is the run folder's own" in result.output and "Traceback" not in result.output
    assert (run_dir / "store.sqlite").read_bytes() == before
    assert len(api.open_run(run_dir).cells()) == 4 * 3


def test_a_damaged_config_copy_leaves_the_run_readable(tmp_path):
    # The copy of the config is a convenience: bytes that are not UTF-8 there must not
    # stop curves or advice; the store alone describes the run.
    from typer.testing import CliRunner

    from gridplan.cli import app
    run_dir = _small_run(tmp_path)
    (run_dir / "config.toml").write_bytes(b"\xff\xfe not text \x81")
    assert api.open_run(run_dir).config is None
    result = CliRunner().invoke(app, ["curves", str(run_dir)])
    assert result.exit_code == 0 and "Traceback" not in result.output
    assert "Learning curves" in result.output
