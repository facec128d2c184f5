"""Independent pieces of in-process work spread over this machine's cores by fork.

The deciding and showing sides have work that splits into independent parts
(batches of curve fits, figures of a report) whose inputs are large Python
objects and whose set-up (imports) costs more than the work itself. A forked
child starts with all of that already in memory, so only the results travel
back (pickled). Where fork is not offered (Windows) or not safe (macOS, or
another Python thread is running and might hold a lock the child needs), or
there is one core or one part, the parts run here, one after another: the
answers are the same either way.
"""

from __future__ import annotations

import multiprocessing
import os
import sys
import threading
import warnings
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from contextlib import contextmanager
from typing import Callable, Iterator, Sequence, TypeVar

T = TypeVar("T")

#: The parts of the map now in progress; a forked child reads its part from here.
_PARTS: Sequence[Callable[[], object]] = ()
#: (pause, resume) of our own threads that must not run while this process forks.
_PAUSABLE: list[tuple[Callable[[], None], Callable[[], None]]] = []


def local_cores() -> int:
    """Cores this process may use (its CPU affinity where the system reports one)."""
    if hasattr(os, "sched_getaffinity"):
        return max(1, len(os.sched_getaffinity(0)))
    return max(1, os.cpu_count() or 1)


def can_fork() -> bool:
    """Fork is offered and safe here: not macOS, and no other Python thread that could hold a lock."""
    return (sys.platform != "darwin" and "fork" in multiprocessing.get_all_start_methods()
            and threading.active_count() == 1)


def _run_part(index: int) -> object:
    return _PARTS[index]()


@contextmanager
def paused_while_forking(pause: Callable[[], None], resume: Callable[[], None]) -> Iterator[None]:
    """Inside, a thread of ours (a terminal spinner) is stopped by `pause` for each fork.

    `pause` must return only once the thread has ended; `resume` starts it again.
    """
    entry = (pause, resume)
    _PAUSABLE.append(entry)
    try:
        yield
    finally:
        _PAUSABLE.remove(entry)


def _fork_workers(count: int, tasks: int) -> tuple[ProcessPoolExecutor, list] | None:
    """A pool of `count` forked workers with every task handed out, or None where fork is unsafe.

    Registered threads are paused while the children are made (a fork pool
    makes all of them at the first task) and resumed at once.
    """
    for pause, _ in _PAUSABLE:
        pause()
    try:
        if not can_fork():
            return None
        with warnings.catch_warnings():
            # Python 3.12+ warns before forking a process with any OS thread; here
            # the only others are the BLAS pool's, which prepares itself for fork.
            warnings.filterwarnings("ignore", category=DeprecationWarning, message=".*fork.*")
            pool = ProcessPoolExecutor(count, mp_context=multiprocessing.get_context("fork"))
            try:
                return pool, [pool.submit(_run_part, index) for index in range(tasks)]
            except OSError:          # no more processes or memory for them: work here
                pool.shutdown(wait=False, cancel_futures=True)
                return None
    finally:
        for _, resume in reversed(_PAUSABLE):
            resume()


def run_parts(parts: Sequence[Callable[[], T]], jobs: int | None = None) -> list[T]:
    """Call every part and return the results in order, up to `jobs` at a time (None: all cores).

    An exception raised by a part is raised here, as it would be in a plain loop;
    if a child dies (killed, out of memory) the parts are run here instead.
    """
    global _PARTS
    workers = min(len(parts), local_cores() if jobs is None else max(1, jobs))
    if workers < 2:
        return [part() for part in parts]
    _PARTS = parts
    try:
        started = _fork_workers(workers, len(parts))
        if started is None:
            return [part() for part in parts]
        pool, futures = started
        with pool:
            return [future.result() for future in futures]
    except BrokenProcessPool:
        return [part() for part in parts]
    finally:
        _PARTS = ()
