"""A real ``movecast serve`` process on a free loopback port, for the tests that need one.

Everything stops by itself: the server is killed when the ``with`` block ends (its solver
processes exit when their pipes close), every wait is bounded.
"""

from __future__ import annotations

import os
import re
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager, suppress
from pathlib import Path

import httpx

ROOT = Path(__file__).resolve().parents[2]

__all__ = ["LiveServer", "descendants", "free_port", "live_server", "metric", "paused"]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class LiveServer:
    """A started server: its base URL, host, port, process and log file."""

    def __init__(self, process: subprocess.Popen[bytes], port: int, log: Path) -> None:
        self.process = process
        self.port = port
        self.host = "127.0.0.1"
        self.base = f"http://127.0.0.1:{port}"
        self.log = log

    def log_text(self) -> str:
        return self.log.read_text(encoding="utf-8", errors="replace")


def metric(text: str, name: str, **labels: str) -> float:
    """One sample of a Prometheus text exposition (0 when absent)."""
    inner = ",".join(f'{k}="{v}"' for k, v in labels.items())
    pattern = rf"^{re.escape(name)}" + (rf"\{{{re.escape(inner)}\}}" if labels else "") + r" ([0-9.e+-]+)$"
    found = re.search(pattern, text, flags=re.M)
    return float(found.group(1)) if found else 0.0


def descendants(pid: int) -> list[int]:
    """The processes below ``pid`` (children, their children, ...), read from Linux's ``/proc``."""
    parents: dict[int, int] = {}
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
        except OSError:
            continue  # gone meanwhile
        # pid (comm) state ppid ...: the name may hold spaces, so split after its closing parenthesis
        parents[int(entry.name)] = int(stat.rsplit(")", 1)[1].split()[1])
    found: list[int] = []
    frontier = [pid]
    while frontier:
        here = frontier.pop()
        children = [child for child, parent in parents.items() if parent == here]
        found.extend(children)
        frontier.extend(children)
    return found


@contextmanager
def paused(server: LiveServer) -> Iterator[list[int]]:
    """Stop (SIGSTOP) every process the server started, its compute processes among them, until the
    block ends (SIGCONT).  The server process itself runs on: whatever it sends to compute waits, for
    as long as the test needs, whatever the machine's load, and costs no CPU meanwhile."""
    stopped = descendants(server.process.pid)
    assert stopped, "the server has no compute processes to pause"
    for pid in stopped:
        os.kill(pid, signal.SIGSTOP)
    try:
        yield stopped
    finally:
        for pid in stopped:
            with suppress(ProcessLookupError):
                os.kill(pid, signal.SIGCONT)


@contextmanager
def live_server(
    tmp_path: Path, *, ready_seconds: float = 90, command: list[str] | None = None, **settings: str
) -> Iterator[LiveServer]:
    """Start ``python -m service.cli serve`` with ``MOVECAST_<NAME>`` settings; kill it afterwards.

    ``command`` serves another way instead (its arguments after the interpreter, ``{port}`` put in).
    """
    port = free_port()
    env = {
        **os.environ,
        "MOVECAST_HOST": "127.0.0.1",
        "MOVECAST_PORT": str(port),
        "PYTHONPATH": str(ROOT),
        **{f"MOVECAST_{key.upper()}": value for key, value in settings.items()},
    }
    log_path = tmp_path / f"server-{port}.log"
    with log_path.open("w", encoding="utf-8") as log:
        process = subprocess.Popen(
            [sys.executable, *(part.format(port=port) for part in command or ["-m", "service.cli", "serve"])],
            env=env,
            stdout=log,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
    server = LiveServer(process, port, log_path)
    try:
        give_up = time.monotonic() + ready_seconds
        while True:
            assert process.poll() is None, f"the server exited during start-up:\n{server.log_text()}"
            try:
                if httpx.get(f"{server.base}/readyz", timeout=2).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            assert time.monotonic() < give_up, "the server did not become ready"
            time.sleep(0.1)
        yield server
    finally:
        if process.poll() is None:
            os.killpg(process.pid, signal.SIGKILL)
        process.wait(timeout=30)
