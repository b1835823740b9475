"""Readiness follows the solver pool: a lane that lost every process is not ready, and comes back.

A solver process whose replacement cannot start (no memory, the pod's pids limit) used to
leave its pool one process short for good; with none left, every request of that lane waited
for its time limit while /readyz said ready, so the load balancer kept sending them.  Here the
start of a process is made to fail (an ``OSError`` as ``fork`` raises it, EAGAIN), the
processes are killed, and then starting is allowed again.
"""

from __future__ import annotations

import errno
import os
import signal
import time

import pytest

from service.api.compute import SolverPool, solver_lanes
from service.api.settings import Settings
from service.errors import ComputeDied

pytestmark = pytest.mark.skipif(os.name != "posix", reason="POSIX signals")


def _no_process(*args, **kwargs):
    raise OSError(errno.EAGAIN, "Resource temporarily unavailable")


def _kill_idle(pool: SolverPool) -> None:
    for solver in list(pool._idle.queue):
        os.kill(solver.process.pid, signal.SIGKILL)
        solver.process.join(timeout=10)


def _lose_the_only_solver(pool: SolverPool, monkeypatch) -> None:
    """Start the pool, kill its solver and make every start fail; the call that finds it dead is a 503."""
    pool.start()
    _kill_idle(pool)
    monkeypatch.setattr(pool, "_spawn", _no_process)
    with pytest.raises(ComputeDied):
        pool.run(abs, (-3,), deadline=time.monotonic() + 300, seconds=300)


def test_a_pool_that_cannot_start_a_solver_answers_solver_died_at_once_and_recovers(monkeypatch):
    pool = SolverPool(processes=1, start_retry_seconds=0.0)  # each call may try a start
    try:
        # the dead solver is found, its replacement fails: a 503 of its own kind, not an OSError (a 500)
        _lose_the_only_solver(pool, monkeypatch)
        assert not pool.ready and pool.short
        # the pool holds no process now: the next call is told so at once (it had waited for its
        # time limit, here 300 s, for a solver that would never come)
        with pytest.raises(ComputeDied):
            pool.run(abs, (-3,), deadline=time.monotonic() + 300, seconds=300)
        monkeypatch.undo()
        assert pool.run(abs, (-3,), deadline=time.monotonic() + 300, seconds=300)[0] == 3
        assert pool.ready and not pool.short
    finally:
        pool.close()


def test_readyz_says_not_ready_while_a_lane_has_no_solver_and_ready_once_it_is_started_again(
    make_client, monkeypatch, example
):
    # every request in the heavy lane (heavy_work 1), and sizes no other test uses, so these
    # pools are this test's own
    settings = {"solver_processes": 5, "heavy_solver_processes": 1, "heavy_queue": 613, "heavy_work": 1.0}
    client = make_client(**settings)
    lanes = solver_lanes(Settings(**settings))
    try:
        assert client.get("/readyz").status_code == 200
        heavy = lanes.heavy
        monkeypatch.setattr(heavy, "_spawn", _no_process)
        _kill_idle(heavy)
        # the request finds its solver dead and cannot start another: told to retry (it had
        # been a 500), and the readiness probe takes the pod out of the load balancer's set
        answer = client.post("/design", json=example, headers={"Cache-Control": "no-store"})
        assert answer.status_code == 503, answer.text
        assert answer.headers["retry-after"] == "1"
        answer = client.get("/readyz")
        assert answer.status_code == 503 and answer.json() == {"status": "not_ready"}
        monkeypatch.undo()
        # the probe starts the missing process (in a worker thread): ready again within a bound
        for _ in range(300):
            if client.get("/readyz").status_code == 200:
                break
            time.sleep(0.1)
        assert client.get("/readyz").status_code == 200
        assert client.post("/design", json=example, headers={"Cache-Control": "no-store"}).status_code == 200
    finally:
        lanes.light.close()
        lanes.heavy.close()


def test_while_starts_keep_failing_requests_are_told_at_once_without_a_start_each(monkeypatch, caplog):
    # A pool whose processes cannot start (the pids limit reached) had tried a start, and
    # logged its failure, for every request: a fork attempt and an error line per request at
    # the request rate.  After a failed start the next is tried only after a pause (set far
    # beyond this test here, so no second try can come); the requests meanwhile get 503 at once.
    pool = SolverPool(processes=1, start_retry_seconds=3600.0)
    tries: list[int] = []

    def failing(*args, **kwargs):
        tries.append(1)
        _no_process()

    try:
        pool.start()
        _kill_idle(pool)
        monkeypatch.setattr(pool, "_spawn", failing)
        caplog.set_level("ERROR", logger="movecast.compute")
        for _ in range(20):
            with pytest.raises(ComputeDied):
                pool.run(abs, (-3,), deadline=time.monotonic() + 300, seconds=300)
        pool.top_up()  # as the readiness probe calls it
        assert len(tries) == 1
        assert sum("starting a solver process failed" in r.getMessage() for r in caplog.records) == 1
        assert not pool.ready
    finally:
        pool.close()


def test_a_start_that_fails_part_way_is_a_503_and_the_pool_is_filled_to_its_number_not_beyond(monkeypatch):
    # The second of two processes fails to start.  That had been an OSError (a 500) out of
    # start(), and the next start() had started two more: three held for a pool of two.
    pool = SolverPool(processes=2, start_retry_seconds=0.0)
    spawn = pool._spawn
    started: list[int] = []

    def once(*args, **kwargs):
        if started:
            _no_process()
        started.append(1)
        return spawn(*args, **kwargs)

    try:
        monkeypatch.setattr(pool, "_spawn", once)
        with pytest.raises(ComputeDied):
            pool.start()
        assert pool.ready and pool.short  # one held: it serves, and the next call starts the other
        monkeypatch.undo()
        pool.start()
        assert pool.run(abs, (-3,), deadline=time.monotonic() + 300, seconds=300)[0] == 3
        assert pool._owned == 2 and pool._idle.qsize() == 2
        assert len({solver.process.pid for solver in pool._idle.queue}) == 2
    finally:
        pool.close()


def test_a_pool_closed_while_it_starts_a_process_leaves_none_running(monkeypatch):
    pool = SolverPool(processes=1, start_retry_seconds=0.0)
    try:
        _lose_the_only_solver(pool, monkeypatch)
        monkeypatch.undo()
        spawn = pool._spawn
        fresh = []

        def closed_meanwhile(*args, **kwargs):
            solver = spawn(*args, **kwargs)
            fresh.append(solver)
            pool.close()  # the server stops while the probe's top-up starts a process
            return solver

        monkeypatch.setattr(pool, "_spawn", closed_meanwhile)
        pool.top_up()
        assert fresh, "the top-up started no process"
        fresh[0].process.join(timeout=30)
        assert not fresh[0].process.is_alive()
        assert pool._idle.qsize() == 0
    finally:
        pool.close()


def test_readyz_stays_ready_when_the_cpu_quota_reads_otherwise_after_start_up(make_client, monkeypatch):
    # The light lane's default size is read from the affinity mask and the CPU quota.  Read on
    # every request and probe, a quota that changed (an in-place resize of the pod) named a
    # pool of another size: never started, so /readyz said 503 for good (and a request started
    # a second set of processes beside the first).
    from service.api import compute

    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: set(range(8)), raising=False)
    monkeypatch.setattr(compute, "cgroup_cpu_limit", lambda: 1.0)
    monkeypatch.setattr(compute, "_default_light", {})  # this test's own reading, forgotten after it
    client = make_client(heavy_queue=619)  # a heavy pool no other test uses
    settings = client.app.state.settings
    lanes = solver_lanes(settings)
    try:
        assert client.get("/readyz").status_code == 200
        monkeypatch.setattr(compute, "cgroup_cpu_limit", lambda: 3.0)
        assert client.get("/readyz").status_code == 200
        assert solver_lanes(settings).light is lanes.light
    finally:
        lanes.heavy.close()  # the light pool (one process) is shared with other tests


@pytest.mark.parametrize("on_loop", [False, True], ids=["thread", "event-loop"])
def test_a_call_waiting_when_the_last_solver_is_lost_is_told_at_once(monkeypatch, on_loop):
    # One solver, busy; a second call waits for it.  The solver is killed and its replacement
    # cannot start: the waiting call had waited out its whole time limit for a solver that
    # could not come (here 600 s; the join below gives up long before).
    import asyncio
    import threading

    pool = SolverPool(processes=1, start_retry_seconds=3600.0)
    outcomes: dict[str, BaseException | int] = {}

    def call(name: str, function, args) -> None:
        try:
            if on_loop and name == "waiting":
                run = pool.arun(function, args, deadline=time.monotonic() + 600, seconds=600)
                outcomes[name] = asyncio.run(run)[0]
            else:
                outcomes[name] = pool.run(function, args, deadline=time.monotonic() + 600, seconds=600)[0]
        except BaseException as exc:
            outcomes[name] = exc

    try:
        pool.start()
        (solver,) = list(pool._idle.queue)
        busy = threading.Thread(target=call, args=("busy", time.sleep, (600.0,)), daemon=True)
        busy.start()
        while pool._idle.qsize():
            time.sleep(0.01)
        waiting = threading.Thread(target=call, args=("waiting", abs, (-3,)), daemon=True)
        waiting.start()
        while pool._waiting < 1:
            time.sleep(0.01)
        monkeypatch.setattr(pool, "_spawn", _no_process)
        os.kill(solver.process.pid, signal.SIGKILL)
        busy.join(timeout=120)
        waiting.join(timeout=120)
        assert isinstance(outcomes.get("busy"), ComputeDied)
        assert isinstance(outcomes.get("waiting"), ComputeDied), outcomes
        assert pool._waiting == 0 and not pool.ready
    finally:
        pool.close()
