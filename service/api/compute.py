"""Solver work under a deadline, in separate processes that can be stopped.

Why processes: the time limit must truly bound a request.  A thread cannot be stopped, and
an estimate of the cost from the sizes is only an estimate; a process can be killed.  Each
serving process keeps a small pool of solver processes (``MOVECAST_SOLVER_PROCESSES``, one
by default).  A request takes an idle one, sends it the call and waits until its deadline
(``MOVECAST_REQUEST_TIMEOUT_SECONDS`` from the start of the handler, waiting for a free solver
included).  When the deadline passes, that solver is killed and replaced, and the request is
answered 503 with problem details; the other solvers keep working.  The size caps of the
settings still reject what is plainly too big up front, with a 422 naming the field.

Solver processes start from a fork server that has already imported numpy, scipy and the
schemas, so replacing one takes milliseconds, not the second a fresh interpreter takes.

Two lanes.  Before a request runs, its work is estimated from its sizes
(:func:`service.pipeline.caps.request_work`).  Work above ``MOVECAST_HEAVY_WORK`` goes to
the heavy lane (``MOVECAST_HEAVY_SOLVER_PROCESSES``, one by default), everything else to
the light lane (``MOVECAST_SOLVER_PROCESSES``, one per CPU it may use by default).  A small request
therefore never queues behind a large one.  The heavy lane's processes also run at a higher
niceness (``MOVECAST_HEAVY_NICENESS``, 10 by default), so that the operating system gives
the light lane's processes the CPU first while the heavy lane is busy.  At most
``MOVECAST_HEAVY_QUEUE`` heavy requests wait for the heavy lane; more are answered 503 at
once with ``Retry-After``, so that waiting heavy requests cannot hold every thread of the
serving process.

    budget = Budget(lanes, seconds=30.0)
    response = budget.run(run_design, request, caps, operation="design")
"""

from __future__ import annotations

import asyncio
import atexit
import logging
import math
import multiprocessing
import os
import queue
import threading
import time
from collections.abc import AsyncIterator, Callable
from dataclasses import dataclass
from functools import partial
from multiprocessing.connection import Connection
from multiprocessing.process import BaseProcess
from multiprocessing.reduction import ForkingPickler
from pathlib import Path
from typing import Annotated, Any, TypeVar

import anyio
from fastapi import Depends, Request
from pydantic import BaseModel
from starlette.types import Receive

from service.api.answer_memory import HOLD_KEY, AnswerHold
from service.api.compute_worker import Outcome, rebuild_error, serve_calls
from service.api.deps import SettingsDep
from service.api.idle_solvers import IdleSolvers, await_within, wait_slice
from service.api.metrics import LANE_REQUESTS, SOLVER_SECONDS
from service.errors import (
    ComputeCrashed,
    ComputeDied,
    ComputeOutOfMemory,
    TimeLimitExceeded,
)
from service.pipeline.caps import Caps, request_work
from service.pipeline.memory import HEAVY_MEMORY_BYTES, MemoryEstimate, check_request_memory

__all__ = [
    "Budget",
    "BudgetDep",
    "Lanes",
    "SolverPool",
    "TimeLimitExceeded",
    "cgroup_cpu_limit",
    "default_solver_processes",
    "get_budget",
    "solver_lanes",
    "solver_pool",
]

T = TypeVar("T")

#: Modules the fork server imports once, so each solver process starts ready.
PRELOAD = ["numpy", "scipy.linalg", "service.pipeline.design", "service.api.compute_worker"]

#: Largest answer (bytes, as estimated) that :meth:`Budget.arun` reads on the event loop; a
#: larger one is read in a worker thread, so the loop never copies megabytes for one request.
LOOP_ANSWER_BYTES = 1024 * 1024
#: Seconds after a solver process failed to start before a pool tries another start.  Meanwhile
#: a request that finds its lane without a process is answered 503 at once, without a fork
#: attempt and an error line of its own (the pids limit or the memory is spent: a start per
#: request would only keep it so, and flood the log at the request rate).
START_RETRY_SECONDS = 1.0
log = logging.getLogger("movecast.compute")
#: Warnings raised inside compute calls (numpy overflow and the like), one JSON line each.
solver_log = logging.getLogger("movecast.solver")


def _quota(text: str) -> float | None:
    """CPUs of a ``cpu.max`` line ("$MAX $PERIOD", or a v1 "quota period" pair); None for none or nonsense."""
    parts = text.split()
    if len(parts) != 2 or parts[0] == "max":
        return None
    try:
        quota, period = int(parts[0]), int(parts[1])
    except ValueError:
        return None
    return quota / period if quota > 0 and period > 0 else None


def cgroup_cpu_limit(root: Path = Path("/sys/fs/cgroup"), own: Path = Path("/proc/self/cgroup")) -> float | None:
    """CPUs this process's control group may use by its CFS quota, or None when it has none (or it is unknown).

    cgroup v2: the smallest ``cpu.max`` from the process's group up to the root (a parent's
    limit holds for its children).  cgroup v1: ``cpu.cfs_quota_us`` over ``cpu.cfs_period_us``
    of the cpu controller, at the process's group or, inside a container, at the mount's root.
    Kernel documentation, ``admin-guide/cgroup-v2`` ("cpu.max") and ``scheduler/sched-bwc``.
    """
    try:
        lines = own.read_text(encoding="utf-8").splitlines()
    except OSError:
        return None
    limits: list[float] = []
    for line in lines:
        number, _, rest = line.partition(":")
        controllers, _, path = rest.partition(":")
        relative = path.strip().lstrip("/")
        if number == "0" and controllers == "":
            folder = root / relative
            while True:
                try:
                    found = _quota((folder / "cpu.max").read_text(encoding="utf-8"))
                except (OSError, UnicodeDecodeError):
                    found = None
                if found is not None:
                    limits.append(found)
                if folder == root or root not in folder.parents:
                    break
                folder = folder.parent
        elif "cpu" in controllers.split(","):
            for folder in (root / controllers / relative, root / controllers, root / "cpu" / relative, root / "cpu"):
                try:
                    quota = (folder / "cpu.cfs_quota_us").read_text(encoding="utf-8").strip()
                    period = (folder / "cpu.cfs_period_us").read_text(encoding="utf-8").strip()
                except (OSError, UnicodeDecodeError):
                    continue
                found = _quota(f"{quota} {period}")
                if found is not None:
                    limits.append(found)
                break
    return min(limits) if limits else None


def default_solver_processes() -> int:
    """One light-lane solver process per CPU this process may use: its cores, and its CPU quota rounded up.

    A container limited by a quota (``--cpus``, a Kubernetes CPU limit) still has every core of
    its host in its affinity mask; without the quota a large host would get a process per core.
    """
    try:
        cores = max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        cores = max(1, os.cpu_count() or 1)
    limit = cgroup_cpu_limit()
    return cores if limit is None else max(1, min(cores, math.ceil(limit)))


def _context() -> Any:
    methods = multiprocessing.get_all_start_methods()
    context = multiprocessing.get_context("forkserver" if "forkserver" in methods else "spawn")
    if context.get_start_method() == "forkserver":
        context.set_forkserver_preload(PRELOAD)
    return context


@dataclass
class _Solver:
    process: BaseProcess
    conn: Connection


class SolverPool:
    """A fixed number of solver processes, each running one call at a time.

    Parameters
    ----------
    processes : int
        Number of solver processes.
    blas_threads : int
        BLAS/OpenMP threads in each solver process.
    niceness : int
        Added to each solver process's CPU niceness (0: as the serving process).
    max_waiting : int or None
        Most calls waiting for a free solver; one more raises :class:`HeavyLaneFull`.
    start_retry_seconds : float
        After a solver process failed to start, how long no other start is tried
        (:data:`START_RETRY_SECONDS`).

    Processes start on first use; :meth:`close` stops them (also at interpreter exit).
    """

    def __init__(
        self,
        *,
        processes: int,
        blas_threads: int = 1,
        niceness: int = 0,
        max_waiting: int | None = None,
        start_retry_seconds: float = START_RETRY_SECONDS,
    ) -> None:
        self.processes = processes
        self.start_retry_seconds = start_retry_seconds
        self.blas_threads = blas_threads
        self.niceness = niceness
        self.max_waiting = max_waiting
        self._idle: IdleSolvers[_Solver] = IdleSolvers(max_waiting)
        self._lock = threading.Lock()
        self._started = False
        self._closed = False
        self._context = _context()
        #: Solver processes this pool holds, idle or busy: one fewer while a replacement fails to start.
        self._owned = 0
        self._owned_lock = threading.Lock()
        self._topping_up = threading.Lock()
        #: ``time.monotonic()`` before which no start is tried (a start failed just before).
        self._next_start = 0.0

    def _spawn(self, *, counted: bool = True) -> _Solver:
        """Start a solver process; ``counted``: one more held (a replacement takes the place of the one it replaces)."""
        parent, child = self._context.Pipe(duplex=True)
        process = self._context.Process(
            target=serve_calls,
            args=(child, self.blas_threads, self.niceness),
            name="movecast-solver",
            daemon=True,
        )
        process.start()
        child.close()
        if counted:
            with self._owned_lock:
                self._owned += 1
        return _Solver(process, parent)

    def start(self) -> None:
        """Start the solver processes now (idempotent).

        Raises :class:`ComputeDied` (a 503) when one could not be started; the pool is started
        all the same, one short, and the missing ones are started later (:meth:`top_up`).
        """
        with self._lock:
            if self._started or self._closed:
                return
            self._started = True
            while self._owned < self.processes:
                try:
                    solver = self._spawn()
                except Exception as exc:
                    self._start_failed(exc)
                    raise ComputeDied("a solver process could not be started") from exc
                self._keep(solver)

    def _start_failed(self, exc: BaseException) -> None:
        """Log a failed start; no other start is tried for ``start_retry_seconds``."""
        self._next_start = time.monotonic() + self.start_retry_seconds
        log.error("starting a solver process failed: %r", exc)

    def _keep(self, solver: _Solver) -> None:
        """Give a fresh solver to the idle ones; stop it if the pool was closed meanwhile."""
        self._idle.put(solver)
        if self._closed:
            self._retire_idle()

    def _retire(self, solver: _Solver) -> None:
        solver.conn.close()
        if solver.process.is_alive():
            solver.process.kill()
        solver.process.join(timeout=5)

    @property
    def ready(self) -> bool:
        """Whether the pool is started, not closed, and holds at least one solver process."""
        return self._started and not self._closed and self._owned > 0

    @property
    def short(self) -> bool:
        """Whether the pool holds fewer solver processes than its number (a replacement failed to start)."""
        return self._started and not self._closed and self._owned < self.processes

    def top_up(self, *, wait: bool = True) -> None:
        """Start solver processes until the pool holds its number again.

        A start that fails (no memory, no process left under the pids limit) is logged and
        tried again by a later call, by a request or by the readiness probe, once
        ``start_retry_seconds`` have passed (a call before then does nothing).  One caller at a
        time does it; the others wait for it, or with ``wait=False`` go on at once.
        """
        if time.monotonic() < self._next_start or not self._topping_up.acquire(blocking=wait):
            return
        try:
            while self.short and time.monotonic() >= self._next_start:
                try:
                    solver = self._spawn()
                except Exception as exc:
                    self._start_failed(exc)
                    return
                self._keep(solver)
        finally:
            self._topping_up.release()

    def _check_owned(self) -> None:
        """Raise :class:`ComputeDied` (a 503) when the pool holds no solver process: none would come.

        A pool short of its number but holding some is topped up only if nobody does it
        already: the call goes on with the processes there are.
        """
        if self.short:
            self.top_up(wait=self._owned <= 0)
        if self._owned <= 0:
            raise ComputeDied("no solver process could be started")

    @property
    def _waiting(self) -> int:
        """How many calls wait for a free solver of this pool."""
        return self._idle.waiting

    @staticmethod
    def _usable(solver: _Solver) -> bool:
        """Whether an idle solver is alive and has nothing unread on its pipe."""
        if solver.process.is_alive() and not solver.conn.poll(0):
            return True
        log.warning("an idle solver process had died (exit code %s); replaced", solver.process.exitcode)
        return False

    def _take(self, deadline: float, seconds: float, cancel: threading.Event | None) -> _Solver:
        """An idle, living solver (a dead one found idle is replaced first).

        Raises :class:`HeavyLaneFull` when ``max_waiting`` calls already wait for this pool.
        """
        while True:
            self._check_owned()
            solver = self._idle.take(deadline, seconds, cancel)
            if self._usable(solver):
                return solver
            self._replace(solver)

    def _replace(self, solver: _Solver) -> None:
        """Retire ``solver`` and start another; one that fails to start leaves the pool short (logged)."""
        self._retire(solver)
        if self._closed:
            return
        try:
            fresh = self._spawn(counted=False)
        except Exception as exc:
            with self._owned_lock:
                self._owned -= 1
                none_left = self._owned <= 0
            self._start_failed(exc)
            if none_left:  # the calls waiting for a solver would wait out their time limit for none
                self._idle.fail_waiting(partial(ComputeDied, "no solver process could be started"))
            return
        self._keep(fresh)

    def _replace_later(self, loop: asyncio.AbstractEventLoop, solver: _Solver) -> None:
        """:meth:`_replace` in a worker thread (it kills, waits and starts a process), not on the loop."""
        done = loop.run_in_executor(None, self._replace, solver)
        done.add_done_callback(_log_failure)

    @staticmethod
    def _sent(solver: _Solver, payload: memoryview, attempt: int, replace: Callable[[_Solver], None]) -> bool:
        """Send a pickled call; False when the solver had died (it is replaced, and the call goes to another).

        Raises :class:`ComputeDied` when that happens on the second attempt.
        """
        try:
            solver.conn.send_bytes(payload)
        except (OSError, EOFError):
            log.warning(
                "a solver process died before its call was sent; %s", "retrying" if attempt == 1 else "giving up"
            )
            replace(solver)
            if attempt == 2:
                raise ComputeDied("the solver process stopped before the call") from None
            return False
        return True

    def _wait(self, solver: _Solver, deadline: float, seconds: float, cancel: threading.Event | None) -> Outcome:
        while not solver.conn.poll(wait_slice(deadline, seconds, cancel, queued=False)):
            pass
        return _received(solver)

    def run(
        self,
        call: Callable[..., T],
        args: tuple[Any, ...],
        *,
        deadline: float,
        seconds: float,
        cancel: threading.Event | None = None,
    ) -> tuple[T, float]:
        """Run ``call(*args)`` in a solver before ``deadline`` (``time.monotonic``).

        A solver found dead while idle is replaced before it gets the call; a call whose
        solver dies before it could be sent is sent once more, to a fresh solver.

        Returns
        -------
        value, seconds
            The call's result and the time it took in the solver.

        Raises
        ------
        TimeLimitExceeded
            No solver was free in time, or the call did not finish in time (its solver is
            killed and replaced).
        Cancelled
            ``cancel`` was set (the client left): the call is stopped, its solver replaced.
        ComputeDied
            The solver process died during the call (replaced).
        ComputeOutOfMemory
            The call raised ``MemoryError`` in the solver.
        ComputeCrashed
            The call raised something other than a movecast error (traceback logged).
        MovecastError
            Whatever the call raised on purpose (InvalidRequest, NumericalError).
        """
        self.start()
        payload = _pickled(call, args)  # before a solver is taken: a call that cannot be pickled costs none
        for attempt in (1, 2):
            solver = self._take(deadline, seconds, cancel)
            if self._sent(solver, payload, attempt, self._replace):
                break
        healthy = False
        try:
            outcome = self._wait(solver, deadline, seconds, cancel)
            healthy = True
        finally:
            if healthy:
                self._idle.put(solver)
            else:
                self._replace(solver)
        return _value(outcome)

    async def arun(
        self,
        call: Callable[..., T],
        args: tuple[Any, ...],
        *,
        deadline: float,
        seconds: float,
        cancel: threading.Event | None = None,
        gone: asyncio.Future[None] | None = None,
    ) -> tuple[T, float]:
        """:meth:`run` from a task on the event loop, which waits for its solver and its answer without a thread.

        The call is pickled and sent, and its answer read, on the loop: meant for small
        requests and answers (the light lane's designs).  Replacing a solver (after a time
        limit, a cancellation or a death) runs in a worker thread.  ``gone``, a future on
        the loop resolved when the client leaves (with ``cancel`` set), wakes either wait at
        once (:func:`service.api.idle_solvers.await_within`); without it ``cancel`` is looked
        at every :data:`service.api.idle_solvers.POLL_SECONDS`.  Raises as :meth:`run`.
        """
        loop = asyncio.get_running_loop()
        if not self._started:
            await loop.run_in_executor(None, self.start)
        payload = _pickled(call, args)
        for attempt in (1, 2):
            solver = await self._atake(loop, deadline, seconds, cancel, gone)
            if self._sent(solver, payload, attempt, lambda dead: self._replace_later(loop, dead)):
                break
        healthy = False
        try:
            outcome = await self._answer(loop, solver, deadline, seconds, cancel, gone)
            healthy = True
        finally:
            if healthy:
                self._idle.put(solver)
            else:
                self._replace_later(loop, solver)
        return _value(outcome)

    async def _atake(
        self,
        loop: asyncio.AbstractEventLoop,
        deadline: float,
        seconds: float,
        cancel: threading.Event | None,
        gone: asyncio.Future[None] | None,
    ) -> _Solver:
        """:meth:`_take` on the loop: a dead solver found idle is replaced in a worker thread."""
        while True:
            if self.short:
                await loop.run_in_executor(None, self._check_owned)
            solver = await self._idle.atake(deadline, seconds, cancel, gone)
            if self._usable(solver):
                return solver
            self._replace_later(loop, solver)

    async def _answer(
        self,
        loop: asyncio.AbstractEventLoop,
        solver: _Solver,
        deadline: float,
        seconds: float,
        cancel: threading.Event | None,
        gone: asyncio.Future[None] | None,
    ) -> Outcome:
        """The outcome on ``solver``'s pipe, awaited by the loop's reader callback (readable: an answer or EOF)."""
        readable: asyncio.Future[None] = loop.create_future()
        fd = solver.conn.fileno()

        def ready() -> None:
            if not readable.done():
                readable.set_result(None)

        loop.add_reader(fd, ready)
        try:
            await await_within(readable, deadline, seconds, cancel, gone, queued=False)
        finally:
            loop.remove_reader(fd)
        return _received(solver)

    def close(self) -> None:
        """Stop every idle solver; busy ones stop when their pipe closes."""
        with self._lock:
            self._closed = True
        self._retire_idle()

    def _retire_idle(self) -> None:
        while True:
            try:
                self._retire(self._idle.get_nowait())
            except queue.Empty:
                return


def _received(solver: _Solver) -> Outcome:
    """The outcome waiting on ``solver``'s pipe; :class:`ComputeDied` when the pipe ended instead."""
    try:
        outcome: Outcome = solver.conn.recv()
    except (EOFError, OSError) as exc:
        raise ComputeDied(f"the solver process stopped (exit code {solver.process.exitcode})") from exc
    return outcome


def _pickled(call: Callable[..., Any], args: tuple[Any, ...]) -> memoryview:
    """The message of a call to a solver, as ``Connection.send`` would write it (``ForkingPickler``).

    Pickled before a solver is taken: when the call cannot be pickled, the error reaches the
    caller and no solver is left holding half a message (or lost to the pool).
    """
    return ForkingPickler.dumps((call, args))


def _log_failure(done: asyncio.Future[None]) -> None:
    """Log the error of a replacement that ran in a worker thread (nobody awaits it)."""
    if not done.cancelled() and done.exception() is not None:
        log.error("replacing a solver process failed: %r", done.exception())


def _value(outcome: Outcome) -> tuple[Any, float]:
    """The value and solver seconds of an outcome (:mod:`service.api.compute_worker`), or its error raised."""
    *result, caught = outcome
    for category, message in caught:
        solver_log.warning("%s: %s", category, message, extra={"category": category})
    if result[0] == "ok":
        return result[1], result[2]
    if result[0] == "memory":
        raise ComputeOutOfMemory("the solver ran out of memory")
    if result[0] == "crash":
        log.error("the solver raised %s", result[1], extra={"exception_type": result[1], "traceback": result[2]})
        raise ComputeCrashed(f"the solver raised {result[1]}")
    raise rebuild_error(result[1], result[2], result[3])


_pools: dict[tuple[int, str, int, int, int | None], SolverPool] = {}
_pools_lock = threading.Lock()


def _close_all() -> None:
    for pool in list(_pools.values()):
        pool.close()


def solver_pool(
    *,
    processes: int,
    blas_threads: int | None = None,
    lane: str = "light",
    niceness: int = 0,
    max_waiting: int | None = None,
) -> SolverPool:
    """The serving process's pool of that lane and size (one per process, shared by its apps)."""
    threads = blas_threads if blas_threads is not None else _blas_threads_from_env()
    with _pools_lock:
        key = (os.getpid(), lane, processes, niceness, max_waiting)
        pool = _pools.get(key)
        if pool is None:
            if not _pools:
                atexit.register(_close_all)
            pool = _pools[key] = SolverPool(
                processes=processes, blas_threads=threads, niceness=niceness, max_waiting=max_waiting
            )
        return pool


def _blas_threads_from_env() -> int:
    """Threads per heavy-lane solver: ``OMP_NUM_THREADS`` when set (``movecast serve`` sets 1 unless given), else 1."""
    try:
        return max(1, int(os.environ.get("OMP_NUM_THREADS", "1")))
    except ValueError:
        return 1


@dataclass(frozen=True)
class Lanes:
    """The light and the heavy pool, and the work that sends a request to the heavy one."""

    light: SolverPool
    heavy: SolverPool
    heavy_work: float
    heavy_memory: float = HEAVY_MEMORY_BYTES

    def pick(self, work: float, memory: float = 0.0) -> tuple[SolverPool, str]:
        """The pool for a request of ``work`` operations and ``memory`` bytes at its peak, and the lane's name.

        Heavy when either passes its threshold: a request that holds much runs beside the other
        large ones, so the light lane's processes stay small (``service.pipeline.memory``).
        """
        heavy = work > self.heavy_work or memory > self.heavy_memory
        return (self.heavy, "heavy") if heavy else (self.light, "light")

    def start(self) -> None:
        """Start both pools' processes now (idempotent)."""
        self.light.start()
        self.heavy.start()

    def ready(self, loop: asyncio.AbstractEventLoop | None = None) -> bool:
        """Whether both lanes hold a solver process; with ``loop``, a short lane is topped up in a worker thread.

        The readiness probe calls it: a pod whose lane lost its processes leaves the Service's
        endpoints instead of answering every request of that lane with a time limit, and the
        probe's next calls start the missing processes, so it comes back by itself.
        """
        for pool in (self.light, self.heavy):
            if loop is not None and pool.short:
                loop.run_in_executor(None, partial(pool.top_up, wait=False)).add_done_callback(_log_failure)
        return self.light.ready and self.heavy.ready


#: The light lane's default size of each serving process (by pid), read once.
_default_light: dict[int, int] = {}


def _light_processes(settings: Any) -> int:
    """``solver_processes``, or the serving process's :func:`default_solver_processes`, read once.

    Read once: it reads control-group files (tens of microseconds), and every request and every
    readiness probe asks for the lanes.  And a quota that reads otherwise later (a pod resized
    in place) must not name another pool than the one started: the probe would look at a pool
    never started, and a request would start a second set of processes beside the first.
    """
    if settings.solver_processes:
        return int(settings.solver_processes)
    pid = os.getpid()
    found = _default_light.get(pid)
    if found is None:
        with _pools_lock:
            found = _default_light.setdefault(pid, default_solver_processes())
    return found


def solver_lanes(settings: Any) -> Lanes:
    """The serving process's two lanes for these settings (``service.api.settings.Settings``)."""
    light = _light_processes(settings)
    return Lanes(
        # One BLAS thread in the light lane: its problems are small by the lane's definition,
        # and a BLAS thread pool costs them more than it saves (a small design: 4.4 ms with one
        # thread against 21 ms with two, measured side by side on 2 cores).
        light=solver_pool(processes=light, lane="light", blas_threads=1),
        heavy=solver_pool(
            processes=settings.heavy_solver_processes,
            lane="heavy",
            niceness=settings.heavy_niceness,
            max_waiting=settings.heavy_queue,
        ),
        heavy_work=float(settings.heavy_work),
        heavy_memory=float(settings.heavy_memory_bytes),
    )


async def _watch_disconnect(receive: Receive, cancel: threading.Event, gone: asyncio.Future[None]) -> None:
    """Set ``cancel`` and resolve ``gone`` when the client goes away (the ASGI server says ``http.disconnect``)."""
    while True:
        message = await receive()
        if message["type"] == "http.disconnect":
            cancel.set()
            if not gone.done():
                gone.set_result(None)
            return


class Budget:
    """The compute time left to one request; every solver call of the request draws on it.

    ``cancel`` is set when the request's client goes away: the call running then is stopped
    (its solver killed and replaced) and no further call starts.  ``gone``, a future on the
    request's loop resolved at the same moment, lets a call awaited on the loop
    (:meth:`arun`) notice at once instead of looking at ``cancel`` every
    :data:`service.api.idle_solvers.POLL_SECONDS`.  With ``hold`` (the request's
    :class:`service.api.answer_memory.AnswerHold`), the bytes its answer will take in this
    process are reserved before its first call, waiting for room within the same deadline.
    """

    def __init__(
        self,
        lanes: Lanes | SolverPool,
        *,
        seconds: float,
        cancel: threading.Event | None = None,
        gone: asyncio.Future[None] | None = None,
        hold: AnswerHold | None = None,
    ) -> None:
        self.lanes = lanes if isinstance(lanes, Lanes) else Lanes(light=lanes, heavy=lanes, heavy_work=float("inf"))
        self.pool = self.lanes.light
        self.seconds = seconds
        self.deadline = time.monotonic() + seconds
        self.cancel = cancel
        self.gone = gone
        self.hold = hold

    def hold_answer(self, estimate: MemoryEstimate | None) -> None:
        """Reserve the serving-process bytes of the answer ``estimate`` describes (no hold: nothing)."""
        if self.hold is not None and estimate is not None:
            self.hold.take(estimate.served, deadline=self.deadline, seconds=self.seconds, cancel=self.cancel)

    def _route(self, args: tuple[Any, ...], work: float | None) -> tuple[SolverPool, str, MemoryEstimate | None]:
        """The pool and lane of a call, and its memory estimate (a 422 when it exceeds the cap)."""
        request = args[0] if args and isinstance(args[0], BaseModel) else None
        if work is None:
            work = request_work(request) if request is not None else 0.0
        estimate = None
        caps = next((a for a in args if isinstance(a, Caps)), None)
        if request is not None and caps is not None:
            estimate = check_request_memory(request, caps)  # a 422 before any process is taken
        pool, lane = self.lanes.pick(work, estimate.bytes if estimate is not None else 0.0)
        return pool, lane, estimate

    @staticmethod
    def _record(operation: str, lane: str, spent: float) -> None:
        SOLVER_SECONDS.labels(operation=operation).observe(spent)
        LANE_REQUESTS.labels(lane=lane).inc()

    def run(self, call: Callable[..., T], *args: Any, operation: str, work: float | None = None) -> T:
        """Run ``call(*args)`` in a solver process of its lane within the budget; record its time.

        ``work`` (operations) and the request's peak memory choose the lane; by default the work
        is estimated from the first argument when that is a request model
        (:func:`service.pipeline.caps.request_work`).  With the caps among the arguments, a request
        whose memory estimate (:func:`service.pipeline.memory.check_request_memory`) exceeds
        ``max_request_memory_bytes`` is refused with a 422 naming its fields before it runs, and
        the bytes of its answer in this process are held (:meth:`hold_answer`).
        """
        return self._run_routed(*self._route(args, work), call, args, operation)

    def _run_routed(
        self,
        pool: SolverPool,
        lane: str,
        estimate: MemoryEstimate | None,
        call: Callable[..., T],
        args: tuple[Any, ...],
        operation: str,
    ) -> T:
        """:meth:`run` once the lane is chosen: hold the answer's bytes, run, record."""
        self.hold_answer(estimate)
        value, spent = pool.run(call, args, deadline=self.deadline, seconds=self.seconds, cancel=self.cancel)
        self._record(operation, lane, spent)
        return value

    async def arun(self, call: Callable[..., T], *args: Any, operation: str, work: float | None = None) -> T:
        """:meth:`run` from the event loop.

        A light call whose answer is at most :data:`LOOP_ANSWER_BYTES` waits for its solver and
        its answer on the loop (:meth:`SolverPool.arun`): no worker thread, no thread switch on
        the way.  Any other call (the heavy lane, a large answer, an answer that must wait for
        room in the answer memory) runs :meth:`run` in a worker thread, as the synchronous
        routes do.  Raises as :meth:`run`.
        """
        pool, lane, estimate = self._route(args, work)
        served = estimate.served if estimate is not None else 0.0
        on_loop = lane == "light" and served <= LOOP_ANSWER_BYTES
        if on_loop and self.hold is not None and estimate is not None:
            on_loop = self.hold.try_take(estimate.served)
        if not on_loop:
            return await anyio.to_thread.run_sync(self._run_routed, pool, lane, estimate, call, args, operation)
        value, spent = await pool.arun(
            call, args, deadline=self.deadline, seconds=self.seconds, cancel=self.cancel, gone=self.gone
        )
        self._record(operation, lane, spent)
        return value


async def get_budget(settings: SettingsDep, request: Request) -> AsyncIterator[Budget]:
    """A fresh budget of ``request_timeout_seconds`` over the two lanes, cancelled if the client leaves.

    The watch runs on the event loop (it only awaits the ASGI ``http.disconnect`` message);
    the handler finds the budget cancelled: a worker thread looks at ``cancel`` every
    :data:`service.api.idle_solvers.POLL_SECONDS`, and a call awaited on the loop
    (:meth:`Budget.arun`) is woken at once by the ``gone`` future.
    """
    cancel = threading.Event()
    gone: asyncio.Future[None] = asyncio.get_running_loop().create_future()
    watcher = asyncio.ensure_future(_watch_disconnect(request.receive, cancel, gone))
    hold = request.scope.get(HOLD_KEY)  # released once the response is sent (AnswerMemoryMiddleware)
    try:
        yield Budget(
            solver_lanes(settings), seconds=settings.request_timeout_seconds, cancel=cancel, gone=gone, hold=hold
        )
    finally:
        watcher.cancel()


BudgetDep = Annotated[Budget, Depends(get_budget)]
