"""Solver processes killed and not restartable under a load of small designs, on a real server.

A ``movecast serve`` on loopback (``tests/api/spawn_fault_serve.py``: its solver processes
cannot start while a flag file exists) takes a bounded load of small /design requests from two
clients.  Its solver processes are killed (SIGKILL) under the load; then starting them is made
to fail and they are killed again, until the light lane holds none; then starting is allowed
again.  Every answer must be 200 or a documented 503 with ``Retry-After``; /readyz must say
503 while the lane holds no process and 200 again after; the server must stop cleanly with no
process of its own left.  Every wait is bounded by a limit far above what an idle machine
needs; none is a pass criterion.
"""

from __future__ import annotations

import os
import signal
import threading
import time
from collections.abc import Callable
from contextlib import suppress
from pathlib import Path

import httpx
import pytest

from service.pipeline.examples import load_example
from tests.api.live import descendants, live_server

pytestmark = pytest.mark.skipif(
    os.name != "posix" or not Path("/proc/self/stat").is_file(), reason="POSIX signals and Linux's /proc"
)

#: Bound of every wait of the test.
WAIT_SECONDS = 120
#: Requests each client sends at most: the load stops by itself.
REQUESTS_PER_CLIENT = 3000
#: Seconds a client waits after a 503 before its next request (a client heeding Retry-After, a
#: fraction of it here: the load keeps going through each phase, and fewer requests are spent).
BACK_OFF_SECONDS = 0.2
#: The 503 problems a request may get on these paths, each with Retry-After.
DOCUMENTED_503 = {"urn:movecast:problem:solver-failed", "urn:movecast:problem:time-limit", "urn:movecast:problem:busy"}


def _parent(pid: int) -> int | None:
    try:
        return int(Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[1])
    except (OSError, IndexError, ValueError):
        return None


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except (OSError, IndexError):
        return False
    return state != "Z"


def _kill_solvers(server_pid: int) -> int:
    """SIGKILL every solver process (the fork server's children); how many were killed."""
    killed = 0
    for pid in descendants(server_pid):
        parent = _parent(pid)
        if parent is not None and parent != server_pid:
            with suppress(ProcessLookupError):
                os.kill(pid, signal.SIGKILL)
                killed += 1
    return killed


def _until(condition: Callable[[], bool], what: str) -> None:
    give_up = time.monotonic() + WAIT_SECONDS
    while not condition():
        assert time.monotonic() < give_up, what
        time.sleep(0.05)


def test_killed_and_unstartable_solvers_under_load_get_200_or_a_documented_503(tmp_path, monkeypatch):
    flag = tmp_path / "no-new-solvers"
    monkeypatch.setenv("FAULT_SPAWN_FLAG", str(flag))
    script = str(Path(__file__).with_name("spawn_fault_serve.py"))
    body = load_example("design_request.json")
    answers: list[tuple[int, str, bool]] = []  # status, problem type, whether Retry-After was given
    failures: list[BaseException] = []
    stop = threading.Event()

    with live_server(tmp_path, command=[script], solver_processes="2", request_timeout_seconds="30") as server:

        def client() -> None:
            try:
                with httpx.Client(base_url=server.base, timeout=WAIT_SECONDS) as http:
                    for _ in range(REQUESTS_PER_CLIENT):
                        if stop.is_set():
                            return
                        answer = http.post("/design", json=body, headers={"Cache-Control": "no-store"})
                        kind = answer.json().get("type", "") if answer.status_code != 200 else ""
                        answers.append((answer.status_code, kind, "retry-after" in answer.headers))
                        if answer.status_code == 503:
                            stop.wait(BACK_OFF_SECONDS)
            except BaseException as exc:  # reported below
                failures.append(exc)

        def readyz() -> int:
            return httpx.get(f"{server.base}/readyz", timeout=WAIT_SECONDS).status_code

        def answered(count: int) -> Callable[[], bool]:
            return lambda: len(answers) >= count or not any(t.is_alive() for t in clients)

        clients = [threading.Thread(target=client) for _ in range(2)]
        for thread in clients:
            thread.start()
        try:
            # killed under load and started again: the requests go on
            for _ in range(3):
                _until(answered(len(answers) + 20), "the load stopped")
                assert _kill_solvers(server.process.pid) > 0
            _until(answered(len(answers) + 20), "the load stopped")
            assert readyz() == 200
            # killed while none can be started: the light lane is left without a process
            flag.touch()
            _kill_solvers(server.process.pid)
            _until(lambda: readyz() == 503, "/readyz never said 503 with no light solver process")
            seen = len(answers)
            _until(answered(seen + 20), "the load stopped")
            assert any(status == 503 for status, _, _ in answers[seen:]), "requests were answered without a solver"
            # allowed again: the probe starts the missing processes
            flag.unlink()
            _until(lambda: readyz() == 200, "/readyz did not come back to 200")
            back = len(answers)
            _until(answered(back + 20), "the load stopped")
            assert any(status == 200 for status, _, _ in answers[back:]), "no design was answered after recovery"
        finally:
            stop.set()
            for thread in clients:
                thread.join(timeout=WAIT_SECONDS)
        assert not failures, failures
        assert not any(thread.is_alive() for thread in clients)
        odd = [a for a in answers if a[0] != 200 and (a[0] != 503 or a[1] not in DOCUMENTED_503 or not a[2])]
        assert not odd, odd[:5]
        assert any(kind == "urn:movecast:problem:solver-failed" for _, kind, _ in answers)
        assert len(answers) < 2 * REQUESTS_PER_CLIENT, "the load ran out before the test ended"
        # a graceful stop, and nothing of the server's left running
        own = descendants(server.process.pid)
        assert own, "the server had no processes of its own"
        server.process.send_signal(signal.SIGTERM)
        assert server.process.wait(timeout=WAIT_SECONDS) == 0
        _until(lambda: not any(_alive(pid) for pid in own), "a process of the server outlived it")
        log = server.log_text()
        assert "Traceback" not in log
        assert '"status": 500' not in log
