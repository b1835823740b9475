"""Load test: a mixed workload at fixed concurrency against a real server, checked bit for bit.

Run from the repository root::

    python tests/bench/load.py [--seconds 20] [--concurrency 8] [--workers 1] [--url URL] [--key KEY]

Without ``--url`` the script starts ``movecast serve`` on a free loopback port (with
``--workers`` worker processes) and stops it at the end with SIGTERM.

The workload cycles through, in a fixed order per client thread:

- ``POST /design``: the bundled example plant (small) and a 10-state, 3 x 3 plant with
  Hp 60, Hu 10 (medium), invented with a fixed seed;
- ``POST /design/batch``: three items, one of them invalid and one naming its known
  fingerprint;
- ``GET /healthz``;
- bad requests: a ragged matrix (422) and a body that is not JSON (400).

Every distinct request is first answered serially; under load each answer must have the
same status and exactly the same body bytes (same numbers, bit for bit).  The script prints
requests per second, p50/p99 latency per kind and overall, and the errors (transport
failures, statuses or bodies that differ).  It is a script, not a test: it asserts nothing.
"""

from __future__ import annotations

import argparse
import copy
import json
import os
import platform
import signal
import socket
import subprocess
import sys
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import httpx
import numpy as np

ROOT = Path(__file__).resolve().parents[2]
EXAMPLES = ROOT / "openapi" / "examples"


@dataclass(frozen=True)
class Call:
    kind: str
    method: str
    path: str
    body: bytes | None = None


@dataclass
class Tally:
    latencies: dict[str, list[float]] = field(default_factory=dict)
    errors: list[str] = field(default_factory=list)
    lock: threading.Lock = field(default_factory=threading.Lock)


def _example(name: str) -> dict:
    return json.loads((EXAMPLES / name).read_text(encoding="utf-8"))


def _medium(seed: int = 20261201) -> dict:
    rng = np.random.default_rng(seed)
    n, m, p = 10, 3, 3
    a = rng.normal(size=(n, n))
    a *= 0.95 / max(abs(np.linalg.eigvals(a)))
    return {
        "model": {
            "kind": "state_space",
            "a": a.tolist(),
            "b": rng.normal(size=(n, m)).tolist(),
            "c": rng.normal(size=(p, n)).tolist(),
            "sample_time": 1.0,
        },
        "horizons": {"prediction": 60, "control": 10},
        "weights": {"output": [1.0, 2.0, 0.5], "move": [0.1, 0.2, 0.1]},
    }


def workload(small_fingerprint: str) -> list[Call]:
    small = _example("design_request.json")
    medium = _medium()
    ragged = copy.deepcopy(small)
    ragged["model"]["a"][1].pop()
    batch = {
        "items": [
            {"id": "small", "request": small, "known_fingerprint": small_fingerprint},
            {"id": "medium", "request": medium},
            {"id": "ragged", "request": ragged},
        ]
    }

    def body(value: dict) -> bytes:
        return json.dumps(value).encode("utf-8")

    return [
        Call("design-small", "POST", "/design", body(small)),
        Call("health", "GET", "/healthz"),
        Call("design-medium", "POST", "/design", body(medium)),
        Call("batch", "POST", "/design/batch", body(batch)),
        Call("design-small", "POST", "/design", body(small)),
        Call("bad-422", "POST", "/design", body(ragged)),
        Call("health", "GET", "/healthz"),
        Call("bad-400", "POST", "/design", b'{"model": [1, 2'),
    ]


def send(client: httpx.Client, call: Call) -> httpx.Response:
    headers = {"content-type": "application/json"} if call.body is not None else {}
    return client.request(call.method, call.path, content=call.body, headers=headers)


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def start_server(workers: int) -> tuple[subprocess.Popen, str]:
    port = free_port()
    env = {**os.environ, "MOVECAST_HOST": "127.0.0.1", "MOVECAST_LOG_LEVEL": "warning", "PYTHONPATH": str(ROOT)}
    process = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "serve", "--port", str(port), "--workers", str(workers)],
        cwd=ROOT,
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    url = f"http://127.0.0.1:{port}"
    give_up = time.monotonic() + 120
    while time.monotonic() < give_up:
        try:
            if httpx.get(f"{url}/readyz", timeout=2).status_code == 200:
                return process, url
        except httpx.TransportError:
            time.sleep(0.2)
    process.kill()
    raise SystemExit("the server did not become ready")


def percentile(values: list[float], q: float) -> float:
    return float(np.percentile(np.asarray(values), q)) * 1000 if values else float("nan")


def run(url: str, *, seconds: float, concurrency: int, key: str | None) -> None:
    headers = {"Authorization": f"Bearer {key}"} if key else {}
    with httpx.Client(base_url=url, headers=headers, timeout=60) as client:
        small = client.post("/design", json=_example("design_request.json")).json()["fingerprint"]
        calls = workload(small)
        expected: dict[Call, tuple[int, bytes]] = {}
        for call in calls:
            if call not in expected:
                answer = send(client, call)
                expected[call] = (answer.status_code, answer.content)
    tally = Tally()
    stop = time.monotonic() + seconds

    def worker(offset: int) -> None:
        with httpx.Client(base_url=url, headers=headers, timeout=60) as client:
            i = offset
            while time.monotonic() < stop:
                call = calls[i % len(calls)]
                i += 1
                started = time.perf_counter()
                try:
                    answer = send(client, call)
                except httpx.HTTPError as exc:
                    with tally.lock:
                        tally.errors.append(f"{call.kind}: {type(exc).__name__}")
                    continue
                elapsed = time.perf_counter() - started
                status, content = expected[call]
                with tally.lock:
                    tally.latencies.setdefault(call.kind, []).append(elapsed)
                    if answer.status_code != status:
                        tally.errors.append(f"{call.kind}: status {answer.status_code}, serially {status}")
                    elif answer.content != content:
                        tally.errors.append(f"{call.kind}: body differs from the serial answer")

    threads = [threading.Thread(target=worker, args=(k,)) for k in range(concurrency)]
    began = time.perf_counter()
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    wall = time.perf_counter() - began

    every = [x for values in tally.latencies.values() for x in values]
    print(
        f"machine: {platform.machine()}, {len(os.sched_getaffinity(0)) if hasattr(os, 'sched_getaffinity') else os.cpu_count()} CPUs, "
        f"Python {platform.python_version()}, {platform.system()} {platform.release()}"
    )
    print(f"date: {time.strftime('%Y-%m-%d %H:%M UTC', time.gmtime())}")
    print(f"{seconds:g} s at concurrency {concurrency}: {len(every)} requests, {len(every) / wall:.1f} requests/s")
    print(f"{'kind':<15}{'count':>8}{'p50 ms':>10}{'p99 ms':>10}")
    for kind in sorted(tally.latencies):
        values = tally.latencies[kind]
        print(f"{kind:<15}{len(values):>8}{percentile(values, 50):>10.2f}{percentile(values, 99):>10.2f}")
    print(f"{'all':<15}{len(every):>8}{percentile(every, 50):>10.2f}{percentile(every, 99):>10.2f}")
    print(f"errors: {len(tally.errors)}")
    for line in sorted(set(tally.errors))[:20]:
        print(f"  {line} (x{tally.errors.count(line)})")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seconds", type=float, default=20.0)
    parser.add_argument("--concurrency", type=int, default=8)
    parser.add_argument("--workers", type=int, default=1, help="worker processes of the started server")
    parser.add_argument("--url", help="use a running server instead of starting one")
    parser.add_argument("--key", help="API key, when the server needs one")
    args = parser.parse_args()
    process = None
    url = args.url
    if url is None:
        process, url = start_server(args.workers)
        print(f"server: movecast serve --workers {args.workers} on {url}")
    try:
        run(url, seconds=args.seconds, concurrency=args.concurrency, key=args.key)
    finally:
        if process is not None:
            process.send_signal(signal.SIGTERM)
            print(f"server exit status after SIGTERM: {process.wait(timeout=120)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
