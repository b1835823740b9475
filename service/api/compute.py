"""Compute work under a deadline, in separate processes that can be stopped.

Why processes: the time limit must truly bound a request.  A thread cannot be stopped, and
an estimate of the cost from the sizes is only an estimate; a process can be killed.  Each
serving process keeps a small pool of compute processes (``MOVECAST_SOLVER_PROCESSES``, one
by default).  A request takes an idle one, sends it the call and waits until its deadline
(``MOVECAST_REQUEST_TIMEOUT_SECONDS`` from the start of the handler, waiting for a free compute process
included).  When the deadline passes, that compute process is killed and replaced, and the request is
answered 503 with problem details; the other compute processes keep working.  The size caps of the
settings still reject what is plainly too big up front, with a 422 naming the field.

Compute processes start from a fork server that has already imported numpy, scipy and the
schemas, so replacing one takes milliseconds, not the second a fresh interpreter takes.

    budget = Budget(pool, seconds=30.0)
    response = budget.run(run_design, request, caps, operation="design")
"""

from __future__ import annotations

import atexit
import multiprocessing
import os
import queue
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from multiprocessing.connection import Connection
from multiprocessing.process import BaseProcess
from typing import Annotated, Any, TypeVar

from fastapi import Depends

from service.api.compute_worker import rebuild_error, serve_calls
from service.api.deps import SettingsDep
from service.api.metrics import SOLVER_SECONDS
from service.errors import ComputeCrashed, TimeLimitExceeded

__all__ = [
    "Budget",
    "BudgetDep",
    "ComputeCrashed",
    "ComputePool",
    "TimeLimitExceeded",
    "compute_pool",
    "get_budget",
]

T = TypeVar("T")

#: Modules the fork server imports once, so each compute process starts ready.
PRELOAD = ["numpy", "scipy.linalg", "service.pipeline.design", "service.api.compute_worker"]


def _context() -> Any:
    methods = multiprocessing.get_all_start_methods()
    context = multiprocessing.get_context("forkserver" if "forkserver" in methods else "spawn")
    if context.get_start_method() == "forkserver":
        context.set_forkserver_preload(PRELOAD)
    return context


@dataclass
class _Worker:
    process: BaseProcess
    conn: Connection


class ComputePool:
    """A fixed number of compute processes, each running one call at a time.

    Parameters
    ----------
    processes : int
        Number of compute processes.
    blas_threads : int
        BLAS/OpenMP threads in each compute process.

    Processes start on first use; :meth:`close` stops them (also at interpreter exit).
    """

    def __init__(self, *, processes: int, blas_threads: int = 1) -> None:
        self.processes = processes
        self.blas_threads = blas_threads
        self._idle: queue.Queue[_Worker] = queue.Queue()
        self._lock = threading.Lock()
        self._started = False
        self._closed = False
        self._context = _context()

    def _spawn(self) -> _Worker:
        parent, child = self._context.Pipe(duplex=True)
        process = self._context.Process(
            target=serve_calls, args=(child, self.blas_threads), name="movecast-compute", daemon=True
        )
        process.start()
        child.close()
        return _Worker(process, parent)

    def start(self) -> None:
        """Start the compute processes now (idempotent)."""
        with self._lock:
            if self._started or self._closed:
                return
            for _ in range(self.processes):
                self._idle.put(self._spawn())
            self._started = True

    def _retire(self, worker: _Worker) -> None:
        worker.conn.close()
        if worker.process.is_alive():
            worker.process.kill()
        worker.process.join(timeout=5)

    def run(self, call: Callable[..., T], args: tuple[Any, ...], *, deadline: float, seconds: float) -> tuple[T, float]:
        """Run ``call(*args)`` in a compute process before ``deadline`` (``time.monotonic``).

        Returns
        -------
        value, seconds
            The call's result and the time it took in the compute process.

        Raises
        ------
        TimeLimitExceeded
            No compute process was free in time, or the call did not finish in time (its compute process is
            killed and replaced).
        ComputeCrashed
            The compute process died or raised something other than a movecast error.
        MovecastError
            Whatever the call raised on purpose (InvalidRequest, NumericalError).
        """
        if deadline <= time.monotonic():
            raise TimeLimitExceeded(seconds, queued=True)
        self.start()
        try:
            worker = self._idle.get(timeout=max(deadline - time.monotonic(), 0.0))
        except queue.Empty:
            raise TimeLimitExceeded(seconds, queued=True) from None
        healthy = False
        try:
            try:
                worker.conn.send((call, args))
                if not worker.conn.poll(max(deadline - time.monotonic(), 0.0)):
                    raise TimeLimitExceeded(seconds, queued=False)
                outcome = worker.conn.recv()
            except (EOFError, OSError) as exc:
                raise ComputeCrashed("the compute process stopped") from exc
            if outcome[0] == "crash":
                raise ComputeCrashed(f"the compute process raised {outcome[1]}")
            healthy = True
        finally:
            if healthy:
                self._idle.put(worker)
            else:
                self._retire(worker)
                if not self._closed:
                    self._idle.put(self._spawn())
        if outcome[0] == "ok":
            return outcome[1], outcome[2]
        raise rebuild_error(outcome[1], outcome[2], outcome[3])

    def close(self) -> None:
        """Stop every idle compute process; busy ones stop when their pipe closes."""
        with self._lock:
            self._closed = True
        while True:
            try:
                self._retire(self._idle.get_nowait())
            except queue.Empty:
                return


_pools: dict[tuple[int, int], ComputePool] = {}
_pools_lock = threading.Lock()


def _close_all() -> None:
    for pool in list(_pools.values()):
        pool.close()


def compute_pool(*, processes: int, blas_threads: int | None = None) -> ComputePool:
    """The serving process's pool of that size (one per process, shared by its apps)."""
    threads = blas_threads if blas_threads is not None else _blas_threads_from_env()
    with _pools_lock:
        key = (os.getpid(), processes)
        pool = _pools.get(key)
        if pool is None:
            if not _pools:
                atexit.register(_close_all)
            pool = _pools[key] = ComputePool(processes=processes, blas_threads=threads)
        return pool


def _blas_threads_from_env() -> int:
    """Threads per compute process: ``OMP_NUM_THREADS`` when set (``movecast serve`` sets it), else 1."""
    try:
        return max(1, int(os.environ.get("OMP_NUM_THREADS", "1")))
    except ValueError:
        return 1


class Budget:
    """The compute time left to one request; every compute call of the request draws on it."""

    def __init__(self, pool: ComputePool, *, seconds: float) -> None:
        self.pool = pool
        self.seconds = seconds
        self.deadline = time.monotonic() + seconds

    def run(self, call: Callable[..., T], *args: Any, operation: str) -> T:
        """Run ``call(*args)`` in a compute process within the budget; record its time."""
        value, spent = self.pool.run(call, args, deadline=self.deadline, seconds=self.seconds)
        SOLVER_SECONDS.labels(operation=operation).observe(spent)
        return value


def get_budget(settings: SettingsDep) -> Budget:
    """A fresh budget of ``request_timeout_seconds`` for this request."""
    pool = compute_pool(processes=settings.solver_processes)
    return Budget(pool, seconds=settings.request_timeout_seconds)


BudgetDep = Annotated[Budget, Depends(get_budget)]
