"""What large answers cost the serving process in memory while it holds and sends them.

Run from the repository root (it starts ``movecast serve`` on a free loopback port and stops
it at the end; every request has a client timeout)::

    python tests/bench/bench_answer_memory.py [--signals 80] [--prediction 200] [--clients 1 3]

The request is a design inside every default cap whose answer is large: a random stable plant
of 10 states with ``--signals`` inputs and as many outputs, Hp ``--prediction`` and Hu 1, so
the horizon gain holds ``signals^2 * Hp`` numbers.  For each count of simultaneous clients it
prints the answer's size and the serving process's resident memory (``VmRSS``) and its peak
(``VmHWM``) from ``/proc`` before and after, and the peak's rise in copies of one answer.

The pod budget of ``tests/api/test_memory_bound.py`` does not count these bytes yet (see the
README's deployment section); this script is the instrument for that work.  Linux only (it
reads ``/proc``).  A script, not a test: it prints figures and asserts nothing.
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import threading
from pathlib import Path
from typing import Any

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "tests" / "bench"))

from bench_design import free_port, load_average, wait_until_healthy  # noqa: E402

MIB = 1024 * 1024


def memory_mib(pid: int) -> tuple[float, float]:
    """``VmRSS`` and ``VmHWM`` of a process, MiB."""
    fields = {}
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        key, _, value = line.partition(":")
        fields[key] = value.split()
    return int(fields["VmRSS"][0]) / 1024, int(fields["VmHWM"][0]) / 1024


def large_answer_body(signals: int, prediction: int, *, seed: int = 5) -> dict[str, Any]:
    """A /design request of a random stable plant (10 states, signals x signals), Hu 1."""
    rng = np.random.default_rng(seed)
    states = 10
    a = rng.normal(size=(states, states))
    a *= 0.9 / max(abs(np.linalg.eigvals(a)))
    return {
        "model": {
            "kind": "state_space",
            "a": a.tolist(),
            "b": rng.normal(size=(states, signals)).tolist(),
            "c": rng.normal(size=(signals, states)).tolist(),
            "time_domain": "discrete",
            "sample_time": 1.0,
        },
        "horizons": {"prediction": prediction, "control": 1},
        "weights": {"output": [1.0] * signals, "move": [0.1] * signals},
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--signals", type=int, default=80)
    parser.add_argument("--prediction", type=int, default=200)
    parser.add_argument("--clients", type=int, nargs="+", default=[1, 3])
    args = parser.parse_args(argv)
    import httpx

    port = free_port()
    base = f"http://127.0.0.1:{port}"
    env = dict(os.environ, MOVECAST_LOG_LEVEL="warning")
    command = [sys.executable, "-m", "service.cli", "serve", "--host", "127.0.0.1", "--port", str(port)]
    server = subprocess.Popen(command, cwd=ROOT, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    print(f"load average {load_average()}; {args.signals} x {args.signals}, Hp {args.prediction}, Hu 1")
    try:
        if not wait_until_healthy(base, server, timeout=180.0):
            print(f"the server did not answer GET /healthz within 180 s (exit status {server.poll()})")
            return 1
        body = large_answer_body(args.signals, args.prediction)
        headers = {"Cache-Control": "no-store"}  # computed each time, kept nowhere
        for clients in args.clients:
            rss, peak = memory_mib(server.pid)
            got: list[tuple[int, int]] = []

            def post() -> None:
                answer = httpx.post(f"{base}/design", json=body, headers=headers, timeout=300.0)
                got.append((answer.status_code, len(answer.content)))

            threads = [threading.Thread(target=post) for _ in range(clients)]
            for thread in threads:
                thread.start()
            for thread in threads:
                thread.join(timeout=600.0)
            after_rss, after_peak = memory_mib(server.pid)
            statuses = sorted({status for status, _ in got})
            size = max((length for _, length in got), default=0) / MIB
            rise = after_peak - peak
            copies = f"{rise / size:.1f} answers" if size else "n/a"
            print(
                f"{clients} client(s): status {statuses}, answer {size:.1f} MiB; serving process "
                f"RSS {rss:.0f} -> {after_rss:.0f} MiB, peak {peak:.0f} -> {after_peak:.0f} MiB "
                f"(rise {rise:.0f} MiB, {copies})",
                flush=True,
            )
    finally:
        server.terminate()
        try:
            server.wait(timeout=60)
        except subprocess.TimeoutExpired:
            server.kill()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
