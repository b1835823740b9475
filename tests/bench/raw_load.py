"""A light load generator: HTTP/1.1 keep-alive over plain sockets, from threads, bounded in time.

httpx costs a Python client about 0.5-1 ms of CPU per request (measured beside the server on
2 cores), as much as the server spends on a small request: with 16 httpx threads in one
process the client, not the server, sets the rate.  This client writes each request from
bytes encoded once and reads the answer by its ``Content-Length``, a few tens of
microseconds per request, so the figures are the server's.  It sends only to the loopback
address it is given, stops at its deadline and reports the client's own CPU per request.

Used by ``bench_goals.py``; not a general HTTP client (no chunked answers, no redirects).
"""

from __future__ import annotations

import os
import socket
import threading
import time
from collections.abc import Callable
from typing import Any

import numpy as np

__all__ = ["encode_request", "raw_load", "run_clients"]


def run_clients(
    worker: Callable[[int], None],
    latencies: list[list[float]],
    errors: list[int],
    gate: threading.Barrier,
    deadline: list[float],
    *,
    seconds: float,
    timeout: float,
) -> dict[str, Any]:
    """Run ``worker(slot)`` on one thread per slot of ``latencies`` for ``seconds``; tally what they recorded.

    The workers wait at ``gate`` and stop at ``deadline[0]`` (set here just before the gate
    opens); each appends the seconds of its 200 answers to ``latencies[slot]`` and counts
    the rest in ``errors[slot]``.  Returns ``ok``, ``errors``, ``rate`` (200s per second),
    ``p50`` and ``p99`` (seconds) and ``client_cpu`` (this process's CPU seconds per request).
    """
    threads = [threading.Thread(target=worker, args=(slot,), daemon=True) for slot in range(len(latencies))]
    for thread in threads:
        thread.start()
    cpu = os.times()
    began = time.perf_counter()
    deadline.append(began + seconds)
    gate.wait()
    for thread in threads:
        thread.join(timeout=seconds + 2 * timeout)
    elapsed = time.perf_counter() - began
    spent = os.times()
    done = np.array([t for slot in latencies for t in slot])
    return {
        "ok": int(done.size),
        "errors": int(sum(errors)),
        "rate": done.size / elapsed,
        "p50": float(np.percentile(done, 50)) if done.size else float("nan"),
        "p99": float(np.percentile(done, 99)) if done.size else float("nan"),
        "client_cpu": (spent.user + spent.system - cpu.user - cpu.system) / max(1, done.size + sum(errors)),
    }


def encode_request(method: str, path: str, body: bytes | None, headers: dict[str, str] | None = None) -> bytes:
    """One HTTP/1.1 request as bytes, with ``Content-Length`` and ``Content-Type: application/json`` for a body."""
    lines = [f"{method} {path} HTTP/1.1", "Host: 127.0.0.1"]
    if body is not None:
        lines += ["Content-Type: application/json", f"Content-Length: {len(body)}"]
    lines += [f"{name}: {value}" for name, value in (headers or {}).items()]
    return ("\r\n".join(lines) + "\r\n\r\n").encode() + (body or b"")


def _answer(sock: socket.socket, pending: bytearray) -> tuple[int, bool]:
    """Read one answer from ``sock`` (leftover bytes in ``pending``); its status and whether the server closes."""
    while b"\r\n\r\n" not in pending:
        chunk = sock.recv(65536)
        if not chunk:
            raise ConnectionError("the server closed the connection")
        pending += chunk
    head, _, _ = bytes(pending).partition(b"\r\n\r\n")
    del pending[: len(head) + 4]
    lines = head.split(b"\r\n")
    status = int(lines[0].split(b" ", 2)[1])
    length = 0
    closes = False
    for line in lines[1:]:
        name, _, value = line.partition(b":")
        name = name.strip().lower()
        if name == b"content-length":
            length = int(value)
        elif name == b"connection" and value.strip().lower() == b"close":
            closes = True
    while len(pending) < length:
        chunk = sock.recv(max(65536, length - len(pending)))
        if not chunk:
            raise ConnectionError("the server closed the connection mid-answer")
        pending += chunk
    del pending[:length]
    return status, closes


def raw_load(
    port: int, requests: list[bytes], *, seconds: float, clients: int, timeout: float = 60.0
) -> dict[str, Any]:
    """Send ``requests`` (each thread cycles through them from its own offset) to 127.0.0.1:``port``.

    Returns the tally of :func:`run_clients`.
    """
    latencies: list[list[float]] = [[] for _ in range(clients)]
    errors = [0] * clients
    gate = threading.Barrier(clients + 1)
    deadline: list[float] = []

    def connect() -> socket.socket:
        sock = socket.create_connection(("127.0.0.1", port), timeout=timeout)
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        return sock

    def worker(slot: int) -> None:
        turn = slot * 7
        sock = connect()
        pending = bytearray()
        sock.sendall(requests[turn % len(requests)])  # warm up, not counted
        _answer(sock, pending)
        gate.wait()
        while time.perf_counter() < deadline[0]:
            turn += 1
            began = time.perf_counter()
            try:
                sock.sendall(requests[turn % len(requests)])
                status, closes = _answer(sock, pending)
            except (OSError, ConnectionError, ValueError, IndexError):
                errors[slot] += 1
                sock.close()
                sock, pending = connect(), bytearray()
                continue
            if status == 200:
                latencies[slot].append(time.perf_counter() - began)
            else:
                errors[slot] += 1
            if closes:
                sock.close()
                sock, pending = connect(), bytearray()
        sock.close()

    return run_clients(worker, latencies, errors, gate, deadline, seconds=seconds, timeout=timeout)
