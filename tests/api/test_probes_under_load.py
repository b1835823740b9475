"""Probes and /metrics answer while the compute side is saturated (a real server on loopback).

More slow designs than the thread pool has threads (anyio's default of 40) are sent at once to
a server with one solver process, so every compute thread is blocked waiting for the solver and
the rest wait for a thread.  The server's own gauge proves they are in flight before and after
the probes; the probes must all answer within the shipped liveness probe's timeout (5 s,
``deploy/kubernetes``).  Nothing here times an answer as a pass criterion: the bound is the
client timeout, far above what an idle server needs and far below the load's duration.
"""

from __future__ import annotations

import os
import threading

import httpx
import numpy as np
import pytest

from tests.api.live import live_server, metric
from tests.conftest import random_design_request

pytestmark = pytest.mark.skipif(os.name != "posix", reason="POSIX process groups")

HEAVY = 48  # more than anyio's 40 worker threads
PROBE_TIMEOUT = 5.0  # seconds: the liveness probe's timeoutSeconds in deploy/kubernetes


def slow_request(seed: int) -> dict:
    """A valid design of about a second of solver work (Hessian 1000 x 1000)."""
    return random_design_request(np.random.default_rng(seed), states=10, signals=10, prediction=150, control=100)


def in_progress(base: str) -> float:
    return metric(
        httpx.get(f"{base}/metrics", timeout=PROBE_TIMEOUT).text, "movecast_requests_in_progress", route="/design"
    )


def test_probes_and_metrics_answer_while_every_compute_thread_waits_for_the_solver(tmp_path):
    with live_server(tmp_path, solver_processes="1", request_timeout_seconds="120") as server:
        body = slow_request(1)
        stop = threading.Event()

        def heavy() -> None:
            try:
                with httpx.Client(timeout=150) as client:
                    client.post(f"{server.base}/design", json=body)
            except httpx.TransportError:
                pass  # the server is killed at the end of the test

        threads = [threading.Thread(target=heavy, daemon=True) for _ in range(HEAVY)]
        for thread in threads:
            thread.start()
        for _ in range(600):  # bounded: at most 600 polls of the gauge
            if in_progress(server.base) >= HEAVY:
                break
            stop.wait(0.05)
        assert in_progress(server.base) >= HEAVY, "the load never reached the server"

        with httpx.Client(base_url=server.base, timeout=PROBE_TIMEOUT) as probe:
            for _ in range(5):
                assert probe.get("/healthz").json()["status"] == "ok"
                assert probe.head("/healthz").status_code == 200
                assert probe.get("/readyz").status_code == 200
                assert "movecast_requests_total" in probe.get("/metrics").text
        # Still saturated after the last probe: more requests in flight than compute threads.
        assert in_progress(server.base) > 40
