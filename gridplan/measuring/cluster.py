"""Run a grid on an existing dask cluster through joblib's dask backend.

The client keeps the store: workers compute rows and send them back, the
client writes them as they arrive (exactly as in a local run), so a run
stopped for any reason resumes from the store. The workload (data and folds)
is broadcast to every worker once; tasks are grouped into chunks so each
scheduler round trip carries enough work.
"""

from __future__ import annotations

import gc
import math
from concurrent.futures import Future
from typing import TYPE_CHECKING, Callable

from joblib import register_parallel_backend
from joblib._dask import DaskDistributedBackend

from gridplan.common.errors import ClusterError
from gridplan.measuring.runner import ProgressCallback, build_tasks, run_grid
from gridplan.measuring.spec import GridSpec
from gridplan.measuring.store import Store

if TYPE_CHECKING:
    from distributed import Client

CONNECT_TIMEOUT = 10.0     # seconds to reach the scheduler
WORKER_TIMEOUT = 10.0      # seconds to wait for a first worker
CHUNKS_PER_THREAD = 4      # enough chunks to balance the load and show progress
MAX_CHUNK = 32             # tasks per chunk at most, so a lost worker loses little
INSTALL_HINT = 'pip install "gridplan[cluster]"'
BACKEND_NAME = "gridplan-dask"   # the runner broadcasts the workload for this backend


class ReportingDaskBackend(DaskDistributedBackend):
    """joblib's dask backend, plus: a batch that dask gives up on stops the run.

    joblib only hears back from a batch that returns; a batch whose workers
    all died (KilledWorker) would leave the run waiting for ever. Here that
    error is handed to joblib, which stops the run and raises it.
    """

    def submit(self, func, callback=None):
        future = super().submit(func, callback)
        if callback is not None:
            future.add_done_callback(lambda done: _report_failure(done, callback))
        return future


def _report_failure(done: Future, callback: Callable) -> None:
    error = done.exception()
    if error is not None:
        callback(error)   # joblib raises an exception it gets as a result


#: How often a run resends its data after a dying worker took the only copy.
LOST_DATA_RETRIES = 2


def run_on_cluster(spec: GridSpec, store: Store, address: str, *,
                   progress: ProgressCallback | None = None, chunk: int | None = None,
                   connect_timeout: float | None = None) -> int:
    """Evaluate the grid's unfinished cells on the dask cluster at `address`.

    Returns the number of fits written. `chunk` is the number of tasks per
    cluster call (chosen from the cluster's size when None).
    """
    _require_dask()
    register_parallel_backend(BACKEND_NAME, ReportingDaskBackend)
    client = connect(address, timeout=connect_timeout)
    try:
        threads = cluster_threads(client, address)
        check_workers_have_gridplan(client, address)
        if chunk is None:
            pending = len(build_tasks(spec, store.finished_keys()))
            chunk = chunk_size(pending, threads)
        stored_before, retries = len(store.finished_keys()), 0
        while True:
            try:
                run_grid(spec, store, jobs=-1, backend=BACKEND_NAME,
                         backend_options={"client": client}, chunk=chunk, progress=progress)
                return len(store.finished_keys()) - stored_before   # retried attempts count too
            except Exception as exc:
                problem = _cluster_problem(exc, address)
                if problem is None:
                    raise
                if _lost_scattered_data(exc, client) and retries < LOST_DATA_RETRIES:
                    retries += 1
                    continue   # a dead worker took the data with it: send it again, go on
                remaining = spec.n_fits - len(store.finished_keys())
                raise ClusterError(
                    f"{problem}; {remaining} of {spec.n_fits} fits are still to do and every "
                    f"finished one is saved, so rerun the same command to compute the rest.") from None
    finally:
        client.close()


def _lost_scattered_data(exc: Exception, client: "Client") -> bool:
    """True when futures were cancelled while the scheduler still answers.

    A worker that dies holding the only copy of the scattered workload makes
    dask cancel every task that needs it; the scheduler itself is fine, so the
    unfinished cells can simply be sent again with a fresh copy.
    """
    from concurrent.futures import CancelledError
    if not isinstance(exc, CancelledError):
        return False
    try:
        client.scheduler_info()
    except Exception:
        return False
    return client.status == "running"


def _require_dask() -> None:
    try:
        import dask  # noqa: F401
        import distributed  # noqa: F401
    except ImportError:
        raise ClusterError(f"running on a dask cluster needs dask and distributed; "
                           f"install them with: {INSTALL_HINT}") from None


def connect(address: str, *, timeout: float | None = None) -> "Client":
    """A dask client connected to the scheduler at `address`, or a GridplanError.

    The scheduler is first asked for its identity under a deadline: dask's own
    handshake waits without limit for a peer that accepts the connection but
    never answers, which would hang the run.
    """
    from distributed import Client
    timeout = CONNECT_TIMEOUT if timeout is None else timeout
    unreachable = (f"cannot reach the dask scheduler at {address} within {timeout:g} s (no connection, "
                   f"or no answer to it); "
                   f"check that `dask scheduler` runs there and the port is open.")
    try:
        answer = probe_scheduler(address, timeout)
    except ValueError as exc:
        raise ClusterError(f"{address!r} is not a dask scheduler address ({exc}); "
                           f"write it as tcp://HOST:PORT.") from None
    except (OSError, TimeoutError):
        raise ClusterError(unreachable) from None
    if not isinstance(answer, dict) or answer.get("type") != "Scheduler":
        raise ClusterError(f"{address} answered, but not as a dask scheduler; check the "
                           f"address and port.")
    try:
        return Client(address, timeout=timeout, set_as_default=False)
    except (OSError, TimeoutError):
        failure = unreachable
    # A client that failed to connect is finalised here, while its event loop
    # still runs; left to the interpreter's exit it prints a spurious error.
    gc.collect()
    raise ClusterError(failure)


def probe_scheduler(address: str, timeout: float) -> object:
    """The scheduler's identity record, each step (connect, handshake, reply) under `timeout`."""
    import asyncio

    from distributed.comm import connect as open_comm

    async def ask() -> object:
        comm = await asyncio.wait_for(open_comm(address, timeout=timeout), timeout)
        try:
            await asyncio.wait_for(comm.write({"op": "identity", "reply": True}), timeout)
            return await asyncio.wait_for(comm.read(), timeout)
        finally:
            comm.abort()

    async def within_deadline() -> object:      # the steps together, too, within `timeout`
        return await asyncio.wait_for(ask(), timeout)

    return asyncio.run(within_deadline())


def cluster_threads(client: "Client", address: str) -> int:
    """Worker threads on the cluster, waiting briefly for a first worker."""
    try:
        client.wait_for_workers(1, timeout=WORKER_TIMEOUT)
    except TimeoutError:
        raise ClusterError(f"the dask scheduler at {address} has no workers after "
                           f"{WORKER_TIMEOUT:g} s; start some with `dask worker {address}`.") from None
    return max(1, sum(client.nthreads().values()))


def check_workers_have_gridplan(client: "Client", address: str) -> None:
    """Refuse workers without gridplan, or with another version of it."""
    from importlib.metadata import PackageNotFoundError, version
    try:
        mine = version("gridplan")
    except PackageNotFoundError:   # running from a source tree: nothing to compare with
        return
    found = _within(lambda: client.run(version, "gridplan", on_error="return"), WORKER_TIMEOUT,
                    f"the dask workers of {address} did not report their gridplan version within "
                    f"{WORKER_TIMEOUT:g} s; check that they are running and reachable.")
    for worker, theirs in sorted(found.items()):
        if isinstance(theirs, PackageNotFoundError):
            raise ClusterError(f"dask worker {worker} (scheduler {address}) does not have "
                               f"gridplan installed; install gridplan {mine} on every worker.")
        if isinstance(theirs, BaseException):
            raise ClusterError(f"dask worker {worker} (scheduler {address}) cannot report its "
                               f"gridplan version: {theirs}.")
        if theirs != mine:
            raise ClusterError(f"dask worker {worker} has gridplan {theirs} but this machine "
                               f"has {mine}; install the same version everywhere so the "
                               f"numbers match.")


def _within(call: Callable[[], object], seconds: float, failure: str) -> object:
    """call() on a daemon thread; a GridplanError(failure) when it has not returned in time."""
    import threading
    outcome: dict = {}

    def target() -> None:
        try:
            outcome["value"] = call()
        except BaseException as exc:    # handed back to the caller's thread
            outcome["error"] = exc

    worker = threading.Thread(target=target, daemon=True)
    worker.start()
    worker.join(seconds)
    if worker.is_alive():
        raise ClusterError(failure)
    if "error" in outcome:
        raise outcome["error"]
    return outcome["value"]


def chunk_size(n_tasks: int, threads: int) -> int:
    """Tasks per cluster call: about CHUNKS_PER_THREAD calls per thread, at most MAX_CHUNK."""
    if n_tasks <= 0:
        return 1
    return max(1, min(MAX_CHUNK, math.ceil(n_tasks / (threads * CHUNKS_PER_THREAD))))


def _cluster_problem(exc: Exception, address: str) -> str | None:
    """A one-clause description of a cluster failure, or None for other errors."""
    from concurrent.futures import CancelledError

    from distributed.comm.core import CommClosedError
    from distributed.scheduler import KilledWorker
    if isinstance(exc, KilledWorker):
        tries = exc.allowed_failures + 1
        last = getattr(exc.last_worker, "address", exc.last_worker)
        return (f"dask workers kept dying while running one batch of cells (it was tried on "
                f"{tries} worker{'s' if tries > 1 else ''}, the last at {last})")
    if isinstance(exc, CancelledError):
        return (f"the cluster at {address} cancelled the run's tasks (the scheduler went away, "
                f"or workers kept dying with the grid's data)")
    if isinstance(exc, (CommClosedError, OSError)):
        return f"the run lost its dask scheduler at {address} ({type(exc).__name__})"
    if isinstance(exc, ImportError):
        return (f"a dask worker could not import what the grid needs ({exc}); install the "
                f"same packages on every worker")
    return None
