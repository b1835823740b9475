"""The idle solver processes of a pool, handed to waiting callers first come, first served.

A caller is either a worker thread (the synchronous routes, :meth:`IdleSolvers.take`) or a
task on the event loop (:meth:`IdleSolvers.atake`, the light designs, which wait for their
solver without a thread).  Both wait in one queue: a solver given back goes to the caller
that has waited longest, whichever kind it is, and only when nobody waits does it go back
to the idle ones.  A thread is woken by its own event; a task by a future that the giver
resolves on the task's loop (``call_soon_threadsafe``), so a solver given back from a worker
thread reaches a task safely.

A caller that stops waiting (its deadline passed, its client left) leaves the queue; if a
solver was already on its way to it, the solver is given back, never lost.  When no solver can
come any more (the pool lost its last one), :meth:`IdleSolvers.fail_waiting` wakes every
waiting caller with an error instead.
"""

from __future__ import annotations

import asyncio
import queue
import threading
import time
from collections import deque
from collections.abc import Callable
from contextlib import suppress
from typing import Any, Generic, TypeVar

from service.errors import Cancelled, HeavyLaneFull, TimeLimitExceeded

__all__ = ["POLL_SECONDS", "IdleSolvers", "await_within", "wait_slice"]

S = TypeVar("S")

#: Seconds between two looks at a caller's cancellation while it waits.
POLL_SECONDS = 0.05


def wait_slice(
    deadline: float, seconds: float, cancel: threading.Event | None, *, queued: bool, poll: bool = True
) -> float:
    """Seconds to wait before looking again, for a caller waiting until ``deadline`` (``time.monotonic``).

    At most :data:`POLL_SECONDS` when ``cancel`` may be set and ``poll`` is true, so that a
    client that left is noticed (``poll=False``: the caller is woken some other way).  Raises
    :class:`Cancelled` when ``cancel`` is set, and :class:`TimeLimitExceeded` (``seconds``:
    the request's time limit; ``queued``: whether it was still waiting for a solver) when the
    deadline has passed.
    """
    if cancel is not None and cancel.is_set():
        raise Cancelled
    left = deadline - time.monotonic()
    if left <= 0:
        raise TimeLimitExceeded(seconds, queued=queued)
    return min(left, POLL_SECONDS) if cancel is not None and poll else left


async def await_within(
    future: asyncio.Future[Any],
    deadline: float,
    seconds: float,
    cancel: threading.Event | None,
    gone: asyncio.Future[None] | None,
    *,
    queued: bool,
) -> None:
    """Wait on the loop until ``future`` is done, within ``deadline`` and while the client stays.

    ``gone`` (a future on the same loop, resolved when the client leaves, at the moment
    ``cancel`` is set) wakes the wait at once, so the wait needs no look every
    :data:`POLL_SECONDS`; without it ``cancel`` is looked at each slice, as a thread does.
    Raises as :func:`wait_slice`; ``future`` itself is neither awaited for its result nor
    cancelled here.
    """
    waits: set[asyncio.Future[Any]] = {future} if gone is None else {future, gone}
    while True:
        slice_ = wait_slice(deadline, seconds, cancel, queued=queued, poll=gone is None)
        await asyncio.wait(waits, timeout=slice_, return_when=asyncio.FIRST_COMPLETED)
        if future.done():
            return
        if gone is not None and gone.done():
            raise Cancelled


class _ThreadWaiter(Generic[S]):
    """A worker thread waiting for a solver: ``solver`` (or ``error``) is set, then ``ready``."""

    __slots__ = ("error", "ready", "solver")

    def __init__(self) -> None:
        self.ready = threading.Event()
        self.solver: S | None = None
        self.error: BaseException | None = None

    def hand(self, solver: S, give_back: Callable[[S], None]) -> None:
        self.solver = solver
        self.ready.set()

    def fail(self, error: BaseException) -> None:
        self.error = error
        self.ready.set()


class _TaskWaiter(Generic[S]):
    """A task on an event loop waiting for a solver: ``future`` gets it, on that loop."""

    __slots__ = ("future", "loop")

    def __init__(self, loop: asyncio.AbstractEventLoop) -> None:
        self.loop = loop
        self.future: asyncio.Future[S] = loop.create_future()

    def hand(self, solver: S, give_back: Callable[[S], None]) -> None:
        try:
            self.loop.call_soon_threadsafe(self._resolve, solver, give_back)
        except RuntimeError:  # the loop is closed (shutdown): nobody will take it there
            give_back(solver)

    def _resolve(self, solver: S, give_back: Callable[[S], None]) -> None:
        if self.future.done():  # the task stopped waiting meanwhile
            give_back(solver)
        else:
            self.future.set_result(solver)

    def fail(self, error: BaseException) -> None:
        with suppress(RuntimeError):  # the loop is closed: nobody waits there
            self.loop.call_soon_threadsafe(self._fail, error)

    def _fail(self, error: BaseException) -> None:
        if not self.future.done():
            self.future.set_exception(error)


class IdleSolvers(Generic[S]):
    """Idle solvers and the callers waiting for one (thread-safe).

    Parameters
    ----------
    max_waiting : int or None
        Most callers waiting at once; one more raises :class:`HeavyLaneFull` at once.
    """

    def __init__(self, max_waiting: int | None = None) -> None:
        self.max_waiting = max_waiting
        self.queue: deque[S] = deque()  # the idle solvers, oldest first
        self._waiters: deque[_ThreadWaiter[S] | _TaskWaiter[S]] = deque()
        self._lock = threading.Lock()

    def qsize(self) -> int:
        """How many solvers are idle."""
        return len(self.queue)

    @property
    def waiting(self) -> int:
        """How many callers wait for a solver."""
        return len(self._waiters)

    def put(self, solver: S) -> None:
        """Give ``solver`` to the caller that has waited longest, or keep it idle."""
        with self._lock:
            if not self._waiters:
                self.queue.append(solver)
                return
            waiter = self._waiters.popleft()
        waiter.hand(solver, self.put)

    def fail_waiting(self, error: Callable[[], BaseException]) -> int:
        """Wake every waiting caller with ``error()`` raised (no solver will come); how many were waiting."""
        with self._lock:
            waiters = list(self._waiters)
            self._waiters.clear()
        for waiter in waiters:
            waiter.fail(error())
        return len(waiters)

    def get_nowait(self) -> S:
        """An idle solver; ``queue.Empty`` when none is."""
        with self._lock:
            if not self.queue:
                raise queue.Empty
            return self.queue.popleft()

    def _claim(self, waiter: _ThreadWaiter[S] | _TaskWaiter[S]) -> S | None:
        """An idle solver now, or None with ``waiter`` queued for the next one given back."""
        with self._lock:
            if self.queue:
                return self.queue.popleft()
            if self.max_waiting is not None and len(self._waiters) >= self.max_waiting:
                raise HeavyLaneFull(len(self._waiters))
            self._waiters.append(waiter)
            return None

    def _leave(self, waiter: _ThreadWaiter[S] | _TaskWaiter[S]) -> bool:
        """Take ``waiter`` out of the queue; False when a solver was already handed to it."""
        with self._lock:
            try:
                self._waiters.remove(waiter)
            except ValueError:
                return False
            return True

    def take(self, deadline: float, seconds: float, cancel: threading.Event | None = None) -> S:
        """An idle solver, waiting in this thread until ``deadline`` (``time.monotonic``).

        Raises
        ------
        HeavyLaneFull
            ``max_waiting`` callers already wait.
        TimeLimitExceeded
            No solver was free before the deadline (``queued=True``).
        Cancelled
            ``cancel`` was set while waiting.
        """
        waiter: _ThreadWaiter[S] = _ThreadWaiter()
        solver = self._claim(waiter)
        if solver is not None:
            return solver
        try:
            while not waiter.ready.wait(wait_slice(deadline, seconds, cancel, queued=True)):
                pass
        except BaseException:
            if not self._leave(waiter):  # handed over (or failed) meanwhile: give a solver back
                waiter.ready.wait()
                if waiter.solver is not None:
                    self.put(waiter.solver)
            raise
        if waiter.error is not None:
            raise waiter.error
        assert waiter.solver is not None
        return waiter.solver

    async def atake(
        self,
        deadline: float,
        seconds: float,
        cancel: threading.Event | None = None,
        gone: asyncio.Future[None] | None = None,
    ) -> S:
        """:meth:`take` for a task on the running event loop: it waits without a thread.

        ``gone``: a future resolved when the client leaves (see :func:`await_within`).
        """
        waiter: _TaskWaiter[S] = _TaskWaiter(asyncio.get_running_loop())
        solver = self._claim(waiter)
        if solver is not None:
            return solver
        try:
            await await_within(waiter.future, deadline, seconds, cancel, gone, queued=True)
            return waiter.future.result()
        except BaseException:
            if not self._leave(waiter):  # handed over, or on its way (the loop resolves it), or failed
                if waiter.future.done() and not waiter.future.cancelled():
                    if waiter.future.exception() is None:
                        self.put(waiter.future.result())
                else:
                    waiter.future.cancel()  # _resolve then gives the solver back
            raise
