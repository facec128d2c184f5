"""Security: nothing read is executed or unpickled; paths stay where they belong."""

from __future__ import annotations

import os
import re
from pathlib import Path

import pytest

from gridplan import api
from gridplan.common.errors import GridplanError
from gridplan.measuring.config import load_config
from tests.helpers import linear_data, write_config

PACKAGE = Path(__file__).resolve().parents[1] / "gridplan"


def test_package_never_unpickles_or_evaluates():
    # Common practice, no published source: pickle.load / eval / exec on data
    # a user hands over can run arbitrary code.
    forbidden = re.compile(r"\b(pickle|cloudpickle|marshal|shelve)\b|\beval\(|\bexec\(|allow_pickle=True")
    offenders = [f"{path.name}:{n}" for path in PACKAGE.glob("*.py")
                 for n, line in enumerate(path.read_text().splitlines(), 1)
                 if forbidden.search(line)]
    assert offenders == []


def test_config_paths_are_relative_to_the_config_file(tmp_path, monkeypatch):
    project = tmp_path / "project"
    (project / "data").mkdir(parents=True)
    linear_data(90, 2, 0.5, seed=1).to_csv(project / "data" / "d.csv", index=False)
    config_path = write_config(project, {
        "data": {"path": "data/d.csv", "target": "y"},
        "model": {"family": "tree", "capacity": {"values": [1, 2]}},
        "sizes": {"values": [20, 60]}, "resampling": {"folds": 3}})
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    config = load_config(Path("..") / "project" / config_path.name)
    assert config.data_path == (project / "data" / "d.csv").resolve()
    run_dir = api.run(config, jobs=1)
    # the default run folder is outputs/<name> under the working directory
    assert run_dir == Path("outputs") / "grid"
    written = {p.name for p in (elsewhere / "outputs" / "grid").iterdir()}
    assert written <= {"store.sqlite", "store.sqlite-wal", "store.sqlite-shm", "config.toml",
                       "run.lock"}


@pytest.mark.parametrize("name", ["../escape", "a/b", "..", "/abs"])
def test_run_name_cannot_leave_the_outputs_folder(tmp_path, name):
    linear_data(60, 2, 0.5, seed=1).to_csv(tmp_path / "d.csv", index=False)
    path = write_config(tmp_path, {
        "data": {"path": "d.csv", "target": "y"},
        "model": {"family": "tree", "capacity": {"values": [1]}},
        "run": {"name": name}})
    with pytest.raises(GridplanError, match="plain folder name"):
        load_config(path)


def test_run_folder_holds_only_plain_formats(tmp_path):
    linear_data(90, 2, 0.5, seed=1).to_csv(tmp_path / "d.csv", index=False)
    config = load_config(write_config(tmp_path, {
        "data": {"path": "d.csv", "target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 2]}},
        "sizes": {"values": [20, 60]}, "resampling": {"folds": 3}}))
    run_dir = api.run(config, out=tmp_path / "run", jobs=2)
    allowed = {".sqlite", ".sqlite-wal", ".sqlite-shm", ".toml", ".lock", ".json", ".png",
               ".svg", ".html", ".csv", ".parquet"}
    for entry in os.listdir(run_dir):
        assert any(entry.endswith(ext) for ext in allowed), entry
