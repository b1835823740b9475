"""Idle solvers handed to threads and event-loop tasks in arrival order; the pool's calls from the loop.

The hand-over is checked with plain tokens in place of solver processes; the pool's own
``arun`` with real solver processes, killed or stopped at chosen moments (never by timing).
"""

from __future__ import annotations

import asyncio
import os
import signal
import threading
import time

import pytest

from service.api import idle_solvers
from service.api.answer_memory import AnswerHold, AnswerMemory
from service.api.compute import SolverPool, _watch_disconnect
from service.api.idle_solvers import IdleSolvers
from service.errors import Cancelled, ComputeDied, HeavyLaneFull, TimeLimitExceeded

pytestmark = pytest.mark.skipif(os.name != "posix", reason="POSIX signals")


async def _until(condition, *, seconds: float = 10.0) -> None:
    """Wait on the loop until ``condition()`` holds (bounded)."""
    end = time.monotonic() + seconds
    while not condition():
        assert time.monotonic() < end, "the condition did not come true"
        await asyncio.sleep(0.005)


def test_waiters_get_solvers_in_arrival_order_threads_and_tasks_alike():
    idle: IdleSolvers[str] = IdleSolvers()
    got: dict[str, str] = {}

    def thread_waiter(name: str) -> None:
        got[name] = idle.take(time.monotonic() + 30, 30)

    async def scenario() -> str:
        first = threading.Thread(target=thread_waiter, args=("thread 1",))
        first.start()
        await _until(lambda: idle.waiting == 1)
        task = asyncio.ensure_future(idle.atake(time.monotonic() + 30, 30))
        await _until(lambda: idle.waiting == 2)
        third = threading.Thread(target=thread_waiter, args=("thread 3",))
        third.start()
        await _until(lambda: idle.waiting == 3)
        idle.put("a")  # from the loop's thread
        giver = threading.Thread(target=lambda: (idle.put("b"), idle.put("c")))  # and from another one
        giver.start()
        answer = await task
        for thread in (first, giver, third):
            thread.join(timeout=30)
        return answer

    assert asyncio.run(scenario()) == "b"
    assert got == {"thread 1": "a", "thread 3": "c"}
    assert idle.waiting == 0 and idle.qsize() == 0
    idle.put("d")  # nobody waits: it stays idle
    assert idle.get_nowait() == "d"


def test_a_task_that_stops_waiting_leaves_the_queue_and_loses_no_solver():
    idle: IdleSolvers[str] = IdleSolvers()

    async def scenario() -> None:
        with pytest.raises(TimeLimitExceeded) as limit:
            await idle.atake(time.monotonic() + 0.05, 0.05)
        assert limit.value.queued and idle.waiting == 0
        # Handed over just as it is cancelled: the solver comes back to the idle ones.
        task = asyncio.ensure_future(idle.atake(time.monotonic() + 30, 30))
        await _until(lambda: idle.waiting == 1)
        idle.put("x")
        task.cancel()
        with pytest.raises(asyncio.CancelledError):
            await task
        await _until(lambda: idle.qsize() == 1)
        # Cancelled by its client while waiting.
        cancel = threading.Event()
        waiting = asyncio.ensure_future(idle.atake(time.monotonic() + 30, 30, cancel))
        idle.get_nowait()
        await _until(lambda: idle.waiting == 1)
        cancel.set()
        with pytest.raises(Cancelled):
            await waiting
        assert idle.waiting == 0

    asyncio.run(scenario())


def test_a_full_waiting_room_is_refused_at_once_from_the_loop_too():
    idle: IdleSolvers[str] = IdleSolvers(max_waiting=1)

    async def scenario() -> None:
        first = asyncio.ensure_future(idle.atake(time.monotonic() + 30, 30))
        await _until(lambda: idle.waiting == 1)
        with pytest.raises(HeavyLaneFull):
            await idle.atake(time.monotonic() + 30, 30)
        with pytest.raises(HeavyLaneFull):
            idle.take(time.monotonic() + 30, 30)
        idle.put("a")
        assert await first == "a"

    asyncio.run(scenario())


def test_calls_from_the_loop_answer_and_survive_time_limits_deaths_and_cancellation():
    pool = SolverPool(processes=1)

    async def call(function, args, *, seconds: float = 30.0, cancel=None):
        return await pool.arun(function, args, deadline=time.monotonic() + seconds, seconds=seconds, cancel=cancel)

    async def scenario() -> None:
        assert (await call(abs, (-3,)))[0] == 3
        # A time limit stops the call; its solver is replaced and the next call is answered.
        with pytest.raises(TimeLimitExceeded) as limit:
            await call(time.sleep, (60.0,), seconds=0.5)
        assert not limit.value.queued
        assert (await call(abs, (-4,)))[0] == 4
        # A solver killed mid-call.
        await _until(lambda: pool._idle.qsize() == 1)  # the replacement is in place
        (busy,) = list(pool._idle.queue)
        running = asyncio.ensure_future(call(time.sleep, (60.0,)))
        await _until(lambda: pool._idle.qsize() == 0)
        os.kill(busy.process.pid, signal.SIGKILL)
        with pytest.raises(ComputeDied):
            await running
        assert (await call(abs, (-5,)))[0] == 5
        # The client leaves mid-call.
        cancel = threading.Event()
        running = asyncio.ensure_future(call(time.sleep, (60.0,), cancel=cancel))
        await _until(lambda: pool._idle.qsize() == 0)
        cancel.set()
        with pytest.raises(Cancelled):
            await running
        # A solver that died idle is replaced before it gets work.
        await _until(lambda: pool._idle.qsize() == 1)
        (idle,) = list(pool._idle.queue)
        os.kill(idle.process.pid, signal.SIGKILL)
        idle.process.join(timeout=10)
        assert (await call(abs, (-6,)))[0] == 6

    try:
        asyncio.run(scenario())
    finally:
        pool.close()


def test_an_answer_hold_takes_room_only_when_it_is_free_now():
    memory = AnswerMemory(limit=1000)
    first, second = AnswerHold(memory), AnswerHold(memory)
    assert first.try_take(600) and memory.held == 600
    assert first.try_take(500) and memory.held == 600  # already held: nothing more is taken
    assert not second.try_take(500) and memory.held == 600 and second.held == 0
    first.release()
    assert second.try_take(500) and memory.held == 500


def test_a_call_that_cannot_be_pickled_fails_alone_and_keeps_the_solver():
    # A lambda does not pickle (the standard library's pickle); the pool's one solver must
    # stay with the pool, so the next call is answered at once rather than at its time limit.
    pool = SolverPool(processes=1)

    async def on_the_loop() -> int:
        with pytest.raises(Exception, match="pickle"):
            await pool.arun(abs, (lambda: 1,), deadline=time.monotonic() + 30, seconds=30)
        return (await pool.arun(abs, (-8,), deadline=time.monotonic() + 30, seconds=30))[0]

    try:
        with pytest.raises(Exception, match="pickle"):
            pool.run(abs, (lambda: 1,), deadline=time.monotonic() + 30, seconds=30)
        assert pool.run(abs, (-7,), deadline=time.monotonic() + 30, seconds=30)[0] == 7
        assert asyncio.run(on_the_loop()) == 8
        assert pool._idle.qsize() == 1
    finally:
        pool.close()


def test_a_client_that_leaves_wakes_a_wait_on_the_loop_without_polling(monkeypatch):
    # With the look at ``cancel`` pushed out to an hour and ``cancel`` itself left unset, a wait
    # that ignored ``gone`` would only end at its deadline; ``gone`` must end it in Cancelled
    # before then, while waiting for a solver and while waiting for an answer.  (What is
    # checked is the order of two events, the end of the wait and its deadline, not a speed.)
    monkeypatch.setattr(idle_solvers, "POLL_SECONDS", 3600.0)
    idle: IdleSolvers[str] = IdleSolvers()
    pool = SolverPool(processes=1)

    async def leave_when(gone: asyncio.Future[None], ready) -> None:
        await _until(ready)
        gone.set_result(None)

    async def scenario() -> None:
        loop = asyncio.get_running_loop()
        cancel = threading.Event()
        # waiting for a solver
        gone = loop.create_future()
        leaving = asyncio.ensure_future(leave_when(gone, lambda: idle.waiting == 1))
        deadline = time.monotonic() + 10
        with pytest.raises(Cancelled):
            await idle.atake(deadline, 10, cancel, gone)
        assert time.monotonic() < deadline
        await leaving
        assert idle.waiting == 0
        # waiting for the answer of a call already running: stopped, its solver replaced
        gone = loop.create_future()
        leaving = asyncio.ensure_future(leave_when(gone, lambda: pool._idle.qsize() == 0))
        deadline = time.monotonic() + 10
        with pytest.raises(Cancelled):
            await pool.arun(time.sleep, (60.0,), deadline=deadline, seconds=10, cancel=cancel, gone=gone)
        assert time.monotonic() < deadline
        await leaving
        assert (await pool.arun(abs, (-9,), deadline=time.monotonic() + 30, seconds=30))[0] == 9
        # an unresolved ``gone`` changes nothing for a call that answers
        assert (await pool.arun(abs, (-10,), deadline=time.monotonic() + 30, seconds=30, gone=loop.create_future()))[
            0
        ] == 10

    try:
        asyncio.run(scenario())
    finally:
        pool.close()


def test_the_disconnect_watch_sets_the_event_and_resolves_the_future():
    messages = [{"type": "http.request", "body": b"", "more_body": False}, {"type": "http.disconnect"}]

    async def receive() -> dict[str, object]:
        return messages.pop(0)

    async def scenario() -> tuple[bool, bool]:
        cancel, gone = threading.Event(), asyncio.get_running_loop().create_future()
        await _watch_disconnect(receive, cancel, gone)
        return cancel.is_set(), gone.done()

    assert asyncio.run(scenario()) == (True, True)
