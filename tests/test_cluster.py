"""Grids on a real dask cluster (on loopback only) against the same grids run locally."""

from __future__ import annotations

import importlib
import os
import signal
import socket
import sys

import pandas as pd
import pytest

pytest.importorskip("distributed")

from distributed import Client, LocalCluster  # noqa: E402

from gridplan import api  # noqa: E402
from gridplan.api import prepare_run_dir  # noqa: E402
from gridplan.common.errors import GridplanError  # noqa: E402
from gridplan.measuring import cluster
from gridplan.measuring.config import load_config  # noqa: E402
from gridplan.measuring.spec import resolve  # noqa: E402
from tests.helpers import linear_data, without_times, write_config  # noqa: E402

KEY = ["capacity_index", "regularization_index", "size_index", "repeat", "fold"]


@pytest.fixture(scope="module")
def dask_cluster():
    """Two single-thread worker processes; every socket on 127.0.0.1, dashboard included."""
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address="127.0.0.1:0") as local:
        with Client(local, set_as_default=False) as client:
            client.run(importlib.import_module, "gridplan.measuring.runner")   # imports once, up front
            yield local, client


def _config(folder, *, fast_path: bool):
    """A small poly-ridge grid; the plain path gives one cluster task per fit."""
    folder.mkdir(parents=True, exist_ok=True)
    linear_data(300, 3, 0.5, seed=6).to_csv(folder / "data.csv", index=False)
    return load_config(write_config(folder, {
        "data": {"path": "data.csv", "target": "y"},
        "model": {"family": "poly-ridge", "capacity": {"values": [1, 2, 3] if fast_path else [1, 2]},
                  "regularization": {"values": [0.01, 1.0, 30.0] if fast_path else [0.01, 30.0]}},
        "sizes": {"values": [20, 60, 120, 200] if fast_path else [20, 60, 200]},
        "resampling": {"folds": 3, "repeats": 2, "seed": 5},
        "run": {"fast_path": fast_path}}))


def _local_table(config, folder):
    api.run(config, out=folder, jobs=1)
    return api.open_run(folder).cells()


@pytest.fixture(scope="module")
def plain_grid(tmp_path_factory):
    """The plain-path config and its table from a local, sequential run."""
    folder = tmp_path_factory.mktemp("plain")
    config = _config(folder, fast_path=False)
    return config, _local_table(config, folder / "local")


def _ready(client: Client, workers: int = 2) -> None:
    """Wait until the nannies have brought back every worker after a kill."""
    client.wait_for_workers(workers, timeout=60)


def _busy_worker_pid(client: Client) -> int | None:
    """The process id of a worker that is running cells right now, if any."""
    def busy(dask_scheduler):
        return [ws.pid for ws in dask_scheduler.workers.values() if ws.processing]
    pids = client.run_on_scheduler(busy)
    return pids[0] if pids else None


def _workloads_held(dask_worker) -> int:
    """How many copies of the grid's workload one worker keeps in memory."""
    return sum(type(value).__name__ == "Workload" for value in dask_worker.data.values())


def test_cluster_table_equals_local_table(tmp_path, dask_cluster):
    # Common practice, no published source: where the fits run must not change
    # the numbers; only fit_seconds may differ.
    local, client = dask_cluster
    _ready(client)
    config = _config(tmp_path, fast_path=True)
    expected = _local_table(config, tmp_path / "local")
    held: list[dict] = []
    seen: list[tuple[int, int]] = []

    def watch(done, total):
        seen.append((done, total))
        if not held and done > 0:
            held.append(client.run(_workloads_held))

    api.run(config, out=tmp_path / "remote", scheduler=local.scheduler_address, progress=watch)
    got = api.open_run(tmp_path / "remote").cells()
    pd.testing.assert_frame_equal(without_times(got), without_times(expected))
    assert (got.status == "ok").all() and (got.fit_seconds > 0).all()
    assert seen[-1] == (len(expected), len(expected))
    # the workload travels as one piece of data, never one copy per task: no
    # worker holds more than one (a worker may not have received it yet when
    # the first rows arrive)
    assert held and max(held[0].values()) == 1 and sum(held[0].values()) >= 1
    # a second run finds every cell done and computes nothing
    spec = resolve(config)
    with prepare_run_dir(spec, tmp_path / "remote") as store:
        assert cluster.run_on_cluster(spec, store, local.scheduler_address) == 0


def _worker_killer(client):
    """A progress callback that SIGKILLs one busy worker after 8 rows, and the list of pids it killed."""
    killed: list[int] = []

    def kill_a_busy_worker(done, total):
        if not killed and done >= 8:
            pid = _busy_worker_pid(client)
            if pid is not None:
                os.kill(pid, signal.SIGKILL)
                killed.append(pid)

    return kill_a_busy_worker, killed


def test_a_killed_worker_is_replaced_and_the_table_is_complete(tmp_path, dask_cluster,
                                                               plain_grid):
    # Common practice, no published source: dask reschedules the cells of a
    # worker that dies; rows already written stay, none is written twice.
    local, client = dask_cluster
    _ready(client)
    config, expected = plain_grid
    kill_a_busy_worker, killed = _worker_killer(client)

    spec = resolve(config)
    with prepare_run_dir(spec, tmp_path / "remote") as store:
        cluster.run_on_cluster(spec, store, local.scheduler_address,
                               progress=kill_a_busy_worker, chunk=1)   # many small tasks in flight
        assert store.integrity_ok()
    assert killed, "no worker was busy after the first rows"
    got = api.open_run(tmp_path / "remote").cells()
    assert not got.duplicated(KEY).any()
    pd.testing.assert_frame_equal(without_times(got), without_times(expected))


def test_when_workers_keep_dying_the_run_says_so_and_a_rerun_completes(tmp_path, dask_cluster,
                                                                       plain_grid):
    # Common practice, no published source: with no retries allowed, a worker
    # death stops the run with a clear message; the saved rows are kept and a
    # rerun fills in the rest, matching the local table.
    local, client = dask_cluster
    _ready(client)
    config, expected = plain_grid

    def set_allowed_failures(n, dask_scheduler):
        previous = dask_scheduler.allowed_failures
        dask_scheduler.allowed_failures = n
        return previous

    kill_a_busy_worker, killed = _worker_killer(client)

    previous = client.run_on_scheduler(set_allowed_failures, 0)
    spec = resolve(config)
    try:
        with prepare_run_dir(spec, tmp_path / "remote") as store:
            with pytest.raises(GridplanError, match="rerun the same command") as caught:
                cluster.run_on_cluster(spec, store, local.scheduler_address,
                                       progress=kill_a_busy_worker, chunk=1)   # many small tasks in flight
            saved = len(store.finished_keys())
    finally:
        client.run_on_scheduler(set_allowed_failures, previous)
    assert killed
    assert "workers kept dying" in str(caught.value)
    assert f"of {len(expected)} fits are still to do" in str(caught.value)
    assert 8 <= saved < len(expected)
    partial = api.open_run(tmp_path / "remote").cells()
    api.run(config, out=tmp_path / "remote", scheduler=local.scheduler_address)
    got = api.open_run(tmp_path / "remote").cells()
    assert not got.duplicated(KEY).any()
    pd.testing.assert_frame_equal(without_times(got), without_times(expected))
    # rows saved before the failure were kept, not recomputed
    kept = got.merge(partial[partial.status == "ok"], on=KEY, suffixes=("", "_before"))
    assert len(kept) == saved and (kept.fit_seconds == kept.fit_seconds_before).all()


def _closed_loopback_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def test_an_unreachable_scheduler_is_named_in_one_sentence(tmp_path):
    config = _config(tmp_path, fast_path=True)
    spec = resolve(config)
    address = f"tcp://127.0.0.1:{_closed_loopback_port()}"
    with prepare_run_dir(spec, tmp_path / "run") as store:
        with pytest.raises(GridplanError, match="cannot reach the dask scheduler at") as caught:
            cluster.run_on_cluster(spec, store, address, connect_timeout=1.0)
        assert address in str(caught.value)
        with pytest.raises(GridplanError, match="not a dask scheduler address"):
            cluster.run_on_cluster(spec, store, "no port here", connect_timeout=1.0)
        assert store.finished_keys() == set()


def test_a_scheduler_without_workers_is_reported(tmp_path, monkeypatch):
    monkeypatch.setattr(cluster, "WORKER_TIMEOUT", 0.5)
    config = _config(tmp_path, fast_path=True)
    spec = resolve(config)
    with LocalCluster(n_workers=0, processes=True, host="127.0.0.1",
                      dashboard_address="127.0.0.1:0") as empty:
        with prepare_run_dir(spec, tmp_path / "run") as store:
            with pytest.raises(GridplanError, match="has no workers") as caught:
                cluster.run_on_cluster(spec, store, empty.scheduler_address)
    assert f"dask worker {empty.scheduler_address}" in str(caught.value)


def test_missing_dask_points_to_the_cluster_extra(tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "distributed", None)   # import fails as if not installed
    config = _config(tmp_path, fast_path=True)
    spec = resolve(config)
    with prepare_run_dir(spec, tmp_path / "run") as store:
        with pytest.raises(GridplanError, match=r'pip install "gridplan\[cluster\]"'):
            cluster.run_on_cluster(spec, store, "tcp://127.0.0.1:1")


class _ClientReporting:
    """Stands in for a dask client whose workers report given gridplan versions."""

    def __init__(self, answers: dict):
        self.answers = answers

    def run(self, function, *args, on_error="raise"):
        return self.answers


def test_workers_without_gridplan_or_with_another_version_are_refused():
    from importlib.metadata import PackageNotFoundError, version
    mine = version("gridplan")
    cluster.check_workers_have_gridplan(_ClientReporting({"tcp://127.0.0.1:1": mine}), "here")
    with pytest.raises(GridplanError, match="tcp://127.0.0.1:2 has gridplan 0.0.1") as caught:
        cluster.check_workers_have_gridplan(
            _ClientReporting({"tcp://127.0.0.1:1": mine, "tcp://127.0.0.1:2": "0.0.1"}), "here")
    assert f"this machine has {mine}" in str(caught.value)
    missing = _ClientReporting({"tcp://127.0.0.1:3": PackageNotFoundError("gridplan")})
    with pytest.raises(GridplanError, match="127.0.0.1:3 .* does not have gridplan installed"):
        cluster.check_workers_have_gridplan(missing, "here")


def test_workers_that_never_report_their_version_time_out(monkeypatch):
    import threading
    monkeypatch.setattr(cluster, "WORKER_TIMEOUT", 0.3)
    released = threading.Event()

    class Silent:
        def run(self, function, *args, on_error="raise"):
            released.wait(30)          # a worker that never answers

    try:
        with pytest.raises(GridplanError, match="did not report their gridplan version within 0.3 s"):
            cluster.check_workers_have_gridplan(Silent(), "tcp://10.0.0.5:8786")
    finally:
        released.set()


@pytest.mark.parametrize("tasks, threads, expected", [
    (0, 2, 1), (5, 2, 1), (9, 2, 2), (64, 2, 8), (600, 2, 32), (600, 64, 3), (10**6, 8, 32)])
def test_chunk_size_gives_each_thread_several_chunks_of_bounded_size(tasks, threads, expected):
    assert cluster.chunk_size(tasks, threads) == expected
