"""Solver processes that die, raise or run out of memory; clients that leave mid-request.

The pool-level tests kill solver processes with SIGKILL at chosen moments; the server-level
test sends long /simulate runs on raw sockets and hangs up, then checks from the server's
own counters and log that each run was stopped (never by timing it).
"""

from __future__ import annotations

import copy
import json
import os
import signal
import socket
import threading
import time

import httpx
import pytest

from service.api.compute import SolverPool
from service.errors import ComputeCrashed, ComputeDied, ComputeOutOfMemory
from service.pipeline.examples import load_example
from tests.api.conftest import assert_problem
from tests.api.live import live_server, metric

pytestmark = pytest.mark.skipif(os.name != "posix", reason="POSIX signals")


def _explode(kind: str) -> None:
    """Raise inside a solver process (a module-level function, so it pickles)."""
    if kind == "memory":
        raise MemoryError
    raise AssertionError("a precondition the checks should have caught")


def _warn_and_return(value: int) -> int:
    import warnings

    warnings.warn("overflow encountered in matmul", RuntimeWarning, stacklevel=1)
    return value


def test_a_solver_that_died_idle_is_replaced_before_it_gets_work():
    pool = SolverPool(processes=1)
    try:
        pool.start()
        (solver,) = list(pool._idle.queue)
        os.kill(solver.process.pid, signal.SIGKILL)
        solver.process.join(timeout=10)
        assert pool.run(abs, (-3,), deadline=time.monotonic() + 30, seconds=30)[0] == 3
    finally:
        pool.close()


def test_a_solver_killed_mid_call_is_solver_died_and_the_next_call_works():
    pool = SolverPool(processes=1)
    try:
        pool.start()
        (solver,) = list(pool._idle.queue)
        killer = threading.Timer(0.5, os.kill, (solver.process.pid, signal.SIGKILL))
        killer.start()
        with pytest.raises(ComputeDied):
            pool.run(time.sleep, (20,), deadline=time.monotonic() + 30, seconds=30)
        killer.join()
        assert pool.run(abs, (-5,), deadline=time.monotonic() + 30, seconds=30)[0] == 5
    finally:
        pool.close()


def test_memory_errors_and_unexpected_errors_come_back_as_their_own_kinds(caplog):
    pool = SolverPool(processes=1)
    try:
        with pytest.raises(ComputeOutOfMemory):
            pool.run(_explode, ("memory",), deadline=time.monotonic() + 30, seconds=30)
        with caplog.at_level("ERROR", logger="movecast.compute"), pytest.raises(ComputeCrashed):
            pool.run(_explode, ("assert",), deadline=time.monotonic() + 30, seconds=30)
        logged = [r for r in caplog.records if r.name == "movecast.compute"]
        assert logged and "Traceback" in logged[-1].traceback and "AssertionError" in logged[-1].traceback
        with caplog.at_level("WARNING", logger="movecast.solver"):
            assert pool.run(_warn_and_return, (7,), deadline=time.monotonic() + 30, seconds=30)[0] == 7
        warned = [r for r in caplog.records if r.name == "movecast.solver"]
        assert warned and warned[-1].getMessage() == "RuntimeWarning: overflow encountered in matmul"
    finally:
        pool.close()


def test_a_solver_that_dies_mid_request_is_a_503_with_retry_after(make_client, example, monkeypatch):
    client = make_client(solver_processes=1)
    from service.api import compute

    pool = compute.solver_pool(processes=1)
    pool.start()
    original = pool._answer  # a light design waits for its answer on the event loop

    async def answer_after_a_kill(loop, solver, *args, **kwargs):
        os.kill(solver.process.pid, signal.SIGKILL)
        return await original(loop, solver, *args, **kwargs)

    monkeypatch.setattr(pool, "_answer", answer_after_a_kill)
    response = client.post("/design", json=example)
    body = assert_problem(response, 503, "solver-failed")
    assert response.headers["retry-after"] == "1" and "retry" in body["detail"].lower()
    monkeypatch.setattr(pool, "_answer", original)
    assert client.post("/design", json=example).status_code == 200


def long_run() -> bytes:
    """The example scenario stretched to 100 000 steps: seconds of solver work."""
    body = copy.deepcopy(load_example("simulate_request.json"))
    body["scenario"]["steps"] = 100_000
    return json.dumps(body).encode("utf-8")


def test_work_of_a_client_that_hung_up_is_stopped(tmp_path):
    with live_server(tmp_path, solver_processes="1", request_timeout_seconds="120") as server:
        payload = long_run()
        request = (
            b"POST /simulate HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\n"
            + f"Content-Length: {len(payload)}\r\n\r\n".encode()
            + payload
        )
        for _ in range(3):
            with socket.create_connection((server.host, server.port), timeout=10) as sock:
                sock.sendall(request)
                for _ in range(200):  # bounded: until the server holds the run
                    text = httpx.get(f"{server.base}/metrics", timeout=10).text
                    if metric(text, "movecast_requests_in_progress", route="/simulate") >= 1:
                        break
                    time.sleep(0.02)
                time.sleep(0.3)
            # the socket is closed here: the client is gone
        closed = 0.0
        for _ in range(400):  # bounded: until the server has stopped all three
            text = httpx.get(f"{server.base}/metrics", timeout=10).text
            closed = metric(text, "movecast_requests_total", method="POST", route="/simulate", status="499")
            if closed >= 3:
                break
            time.sleep(0.05)
        assert closed == 3, server.log_text()[-2000:]
        assert server.log_text().count("its computation was stopped") == 3
        # The solver is free again: a small design is answered while no run is in progress.
        assert metric(text, "movecast_requests_in_progress", route="/simulate") == 0
        example = load_example("design_request.json")
        assert httpx.post(f"{server.base}/design", json=example, timeout=60).status_code == 200
