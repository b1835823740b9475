"""Probes and /metrics answer while the compute side is saturated (a real server on loopback).

The server's compute processes are paused (SIGSTOP, :func:`tests.api.live.paused`), then more
designs than the thread pool has threads (anyio's default of 40) are sent at once: every compute
thread is blocked waiting for a compute process and the rest wait for a thread, and none of them
can finish, however loaded the machine is, until the test lets the processes run again.  The
server's own gauge proves all of them are in flight before and after the probes; the probes must
all answer within the shipped liveness probe's timeout (5 s, ``deploy/kubernetes``).  Nothing
here times an answer as a pass criterion: the bound is the client timeout, far above what a
server needs that never makes a probe wait for compute.
"""

from __future__ import annotations

import os
import threading
from pathlib import Path

import httpx
import numpy as np
import pytest

from tests.api.live import live_server, metric, paused
from tests.conftest import random_design_request

pytestmark = pytest.mark.skipif(
    os.name != "posix" or not Path("/proc/self/stat").is_file(), reason="POSIX signals and Linux's /proc"
)

THREADS = 40  # anyio's default worker threads
HEAVY = 48  # more than THREADS
PROBE_TIMEOUT = 5.0  # seconds: the liveness probe's timeoutSeconds in deploy/kubernetes
#: Seconds the set-up may take to get every request into the server (client threads starting,
#: bodies parsed); a bound on a wait for a state that nothing can undo, not a measured figure.
SETUP_SECONDS = 300.0


def slow_request(seed: int) -> dict:
    """A valid design of one to a few seconds of solver work (Hessian 1500 x 1500): the heavy lane."""
    return random_design_request(np.random.default_rng(seed), states=10, signals=10, prediction=300, control=150)


def in_progress(base: str, *, timeout: float) -> float:
    return metric(httpx.get(f"{base}/metrics", timeout=timeout).text, "movecast_requests_in_progress", route="/design")


def test_probes_and_metrics_answer_while_every_compute_thread_waits_for_the_solver(tmp_path):
    # Every slow design is heavy (service/pipeline/caps.py); the heavy lane's queue is opened
    # wide enough for all of them to wait, so every compute thread is blocked as intended, and
    # the time limit is long enough that none of them gives up while the test runs.
    with live_server(
        tmp_path, solver_processes="1", heavy_queue=str(2 * HEAVY), request_timeout_seconds="900"
    ) as server:
        body = slow_request(1)
        stop = threading.Event()

        def heavy() -> None:
            try:
                with httpx.Client(timeout=1000) as client:
                    client.post(f"{server.base}/design", json=body)
            except httpx.TransportError:
                pass  # the server is killed at the end of the test

        with paused(server):
            threads = [threading.Thread(target=heavy, daemon=True) for _ in range(HEAVY)]
            for thread in threads:
                thread.start()
            # Nothing can finish while compute is paused: wait until every request is in the server.
            for _ in range(int(SETUP_SECONDS / 0.05)):  # bounded
                if in_progress(server.base, timeout=SETUP_SECONDS) >= HEAVY:
                    break
                stop.wait(0.05)
            assert in_progress(server.base, timeout=SETUP_SECONDS) == HEAVY, "the load never reached the server"

            with httpx.Client(base_url=server.base, timeout=PROBE_TIMEOUT) as probe:
                for _ in range(5):
                    assert probe.get("/healthz").json()["status"] == "ok"
                    assert probe.head("/healthz").status_code == 200
                    assert probe.get("/readyz").status_code == 200
                    assert "movecast_requests_total" in probe.get("/metrics").text
            # Still saturated after the last probe: every request still in flight, none answered, so
            # no probe was answered by a thread a finished design had freed.
            assert in_progress(server.base, timeout=SETUP_SECONDS) == HEAVY
