"""Graceful shutdown of a real server process (``python -m service.cli serve``) on loopback.

Several designs are sent at once to a server with one solver process whose compute processes
are paused (SIGSTOP, :func:`tests.api.live.paused`), so that one has been handed to the solver
and the others wait for it when SIGTERM arrives, however loaded the machine is.  While they are
held, a new connection must be refused or told 503 by /readyz; then the compute processes run
again, all of the designs must be answered 200 with a full design, and the process must exit
with status 0 within its grace period.  Every wait is bounded by a limit far above what an idle
machine needs (the time limit and grace period are set long to match); none is a pass criterion.
"""

from __future__ import annotations

import json
import os
import re
import signal
import socket
import subprocess
import sys
import threading
import time
from pathlib import Path

import httpx
import numpy as np
import pytest

from tests.api.live import LiveServer, paused
from tests.conftest import random_design_request

ROOT = Path(__file__).resolve().parents[2]
pytestmark = pytest.mark.skipif(
    not hasattr(signal, "SIGTERM") or os.name != "posix" or not Path("/proc/self/stat").is_file(),
    reason="POSIX signals and Linux's /proc",
)

#: The compute time limit of the server under test; its grace period is this plus 5 s.
TIME_LIMIT = 600
#: Bound of every wait in the test (start-up, the gauge, the answers, the exit): above the grace period.
WAIT_SECONDS = TIME_LIMIT + 60


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def medium_request(seed: int) -> dict:
    """A valid design of about a second of solver work (Hessian 1000 x 1000)."""
    return random_design_request(np.random.default_rng(seed), states=10, signals=10, prediction=150, control=100)


def wait_ready(base: str, process: subprocess.Popen, *, seconds: float = WAIT_SECONDS) -> None:
    give_up = time.monotonic() + seconds
    while time.monotonic() < give_up:
        assert process.poll() is None, "the server exited during start-up"
        try:
            if httpx.get(f"{base}/readyz", timeout=2).status_code == 200:
                return
        except httpx.TransportError:
            pass
        time.sleep(0.2)
    raise AssertionError("the server did not become ready")


def wait_in_progress(base: str, count: int, *, seconds: float = WAIT_SECONDS) -> None:
    """Wait until the server has ``count`` POST /design requests in hand (its own gauge)."""
    give_up = time.monotonic() + seconds
    while time.monotonic() < give_up:
        text = httpx.get(f"{base}/metrics", timeout=seconds).text
        found = re.search(r'^movecast_requests_in_progress\{route="/design"\} ([0-9.]+)$', text, flags=re.M)
        if found and float(found.group(1)) >= count:
            return
        time.sleep(0.05)
    raise AssertionError(f"the server never had {count} designs in progress")


def refused_or_not_ready(base: str) -> bool:
    """Whether a new connection is refused, or /readyz says 503 not_ready."""
    try:
        late = httpx.get(f"{base}/readyz", timeout=WAIT_SECONDS)
    except httpx.TransportError:
        return True  # refused: the listening socket is closed
    if late.status_code == 200:
        return False
    assert late.status_code == 503 and late.json()["status"] == "not_ready", late.text
    return True


def test_sigterm_finishes_in_flight_requests_refuses_new_ones_and_exits_cleanly(tmp_path):
    port = free_port()
    base = f"http://127.0.0.1:{port}"
    env = {
        **os.environ,
        "MOVECAST_HOST": "127.0.0.1",
        "MOVECAST_SOLVER_PROCESSES": "1",
        "MOVECAST_REQUEST_TIMEOUT_SECONDS": str(TIME_LIMIT),
        "PYTHONPATH": str(ROOT),
    }
    log_path = tmp_path / "server.log"
    with log_path.open("w", encoding="utf-8") as log:
        process = subprocess.Popen(
            [sys.executable, "-m", "service.cli", "serve", "--port", str(port)],
            cwd=ROOT,
            env=env,
            stdout=log,
            stderr=subprocess.STDOUT,
        )
    try:
        wait_ready(base, process)
        answers: dict[int, httpx.Response | Exception] = {}

        def post(i: int) -> None:
            try:
                answers[i] = httpx.post(f"{base}/design", json=medium_request(i), timeout=WAIT_SECONDS)
            except Exception as exc:
                answers[i] = exc

        threads = [threading.Thread(target=post, args=(i,)) for i in range(4)]
        with paused(LiveServer(process, port, log_path)):
            for thread in threads:
                thread.start()
            wait_in_progress(base, 4)  # all four are in the server, none can finish: one handed over, three queued
            process.send_signal(signal.SIGTERM)
            # The signal is handled asynchronously: poll (bounded) until new work is turned away,
            # while the four are still held in flight.
            for _ in range(int(WAIT_SECONDS / 0.1)):
                if refused_or_not_ready(base):
                    break
                time.sleep(0.1)
            else:
                raise AssertionError("new connections were still served long after SIGTERM")
            assert not answers, "a design was answered while compute was paused"
        for thread in threads:
            thread.join(timeout=WAIT_SECONDS)
        assert process.wait(timeout=WAIT_SECONDS) == 0
    finally:
        if process.poll() is None:
            process.kill()
            process.wait(timeout=10)

    for i in range(4):
        answer = answers[i]
        assert isinstance(answer, httpx.Response), f"request {i} failed: {answer!r}"
        assert answer.status_code == 200, answer.text
        assert answer.json()["hessian"]["size"] == 1000

    text = log_path.read_text(encoding="utf-8")
    lines = [json.loads(line) for line in text.splitlines() if line.startswith("{")]
    access = [line for line in lines if line["logger"] == "movecast.access" and line["route"] == "/design"]
    assert len(access) == 4 and all(line["status"] == 200 and line["request_id"] for line in access)
    assert any("SIGTERM" in line["message"] for line in lines)
    assert not [line for line in lines if line["logger"] == "uvicorn.access"]


def test_serve_refuses_bad_settings_naming_the_variable_not_the_value():
    env = {**os.environ, "MOVECAST_API_KEYS": "tooshort", "PYTHONPATH": str(ROOT)}
    done = subprocess.run(
        [sys.executable, "-m", "service.cli", "serve", "--port", str(free_port())],
        cwd=ROOT,
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert done.returncode == 2
    assert "MOVECAST_API_KEYS" in done.stderr and "at least 16" in done.stderr
    assert "tooshort" not in done.stderr


def test_serve_sizes_thread_pools_and_the_metrics_folder_before_numpy(monkeypatch):
    from service import cli

    # A private copy of the environment, put back after the test (nothing leaks to others).
    environment = dict(os.environ)
    for name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "PROMETHEUS_MULTIPROC_DIR"):
        environment.pop(name, None)
    monkeypatch.setattr(os, "environ", environment)
    monkeypatch.setattr(cli.os, "sched_getaffinity", lambda pid: set(range(8)), raising=False)
    cli._prepare_process_environment(2)
    # One BLAS thread per process whatever the CPUs: the service scales by processes.
    assert os.environ["OMP_NUM_THREADS"] == os.environ["OPENBLAS_NUM_THREADS"] == os.environ["MKL_NUM_THREADS"] == "1"
    folder = Path(os.environ["PROMETHEUS_MULTIPROC_DIR"])
    assert folder.is_dir() and not list(folder.iterdir())
    # Variables the operator set are kept (the image sets one thread per worker).
    environment["OMP_NUM_THREADS"] = "3"
    (folder / "counter_1.db").write_bytes(b"old")
    cli._prepare_process_environment(2)
    assert os.environ["OMP_NUM_THREADS"] == "3"
    assert not list(folder.glob("*.db")), "old samples are wiped at start-up"


def _living(pids: list[int]) -> list[int]:
    """The processes of ``pids`` still running (a zombie waiting for its reaper has stopped)."""
    alive = []
    for pid in pids:
        try:
            state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
        except OSError:
            continue
        if state not in {"Z", "X"}:
            alive.append(pid)
    return alive


def test_workers_and_their_solvers_stop_when_the_supervisor_is_killed(tmp_path):
    """``movecast serve --workers 2`` killed outright (SIGKILL, as the OOM killer does): no process
    it started may go on, or the orphaned workers keep serving on its port with their solvers."""
    from tests.api.live import descendants

    port = free_port()
    base = f"http://127.0.0.1:{port}"
    env = {**os.environ, "MOVECAST_HOST": "127.0.0.1", "MOVECAST_SOLVER_PROCESSES": "1", "PYTHONPATH": str(ROOT)}
    log_path = tmp_path / "server.log"
    started: list[int] = []
    with log_path.open("w", encoding="utf-8") as log:
        process = subprocess.Popen(
            [sys.executable, "-m", "service.cli", "serve", "--port", str(port), "--workers", "2"],
            cwd=ROOT,
            env=env,
            stdout=log,
            stderr=subprocess.STDOUT,
        )
    try:
        wait_ready(base, process, seconds=120)
        # both workers up, each with its fork server and its light and heavy solvers
        for _ in range(600):
            started = descendants(process.pid)
            if len([pid for pid in started if "movecast-solver" in _cmdline(pid) or _is_solver(pid)]) >= 4:
                break
            time.sleep(0.1)
        assert len(started) >= 6, started
        process.kill()
        process.wait(timeout=30)
        for _ in range(600):
            if not _living(started):
                break
            time.sleep(0.1)
        assert not _living(started), [_cmdline(pid)[:80] for pid in _living(started)]
    finally:
        if process.poll() is None:
            process.kill()
            process.wait(timeout=10)
        for pid in _living(started):
            os.kill(pid, signal.SIGKILL)


def _cmdline(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode(errors="replace")
    except OSError:
        return ""


def _is_solver(pid: int) -> bool:
    """A process forked by a fork server (the solvers): its parent runs multiprocessing.forkserver."""
    try:
        parent = int(Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[1])
    except OSError:
        return False
    return "multiprocessing.forkserver" in _cmdline(parent)
