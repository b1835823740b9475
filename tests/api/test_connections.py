"""Slow and excess connections against a real server: a read deadline and a connection cap.

``MOVECAST_READ_TIMEOUT_SECONDS`` bounds how long a request may take to arrive whole (headers
trickled a byte at a time, or a body that never comes); ``MOVECAST_MAX_CONNECTIONS`` caps open
connections.  Both answers are problem details, and the server goes on serving.

They hold under ``movecast serve`` and under plain uvicorn given the guarded protocol class
(``--http service.api.protocol:GuardedH11Protocol``, the way the README gives for serving the
app factory with uvicorn's own command): the protocol reads the same settings from the
environment either way.
"""

from __future__ import annotations

import json
import os
import socket
import time
from pathlib import Path

import httpx
import pytest

from tests.api.live import live_server

pytestmark = pytest.mark.skipif(os.name != "posix", reason="POSIX process groups")


def read_answer(sock: socket.socket) -> bytes:
    answer = b""
    for _ in range(200):  # bounded; the server closes after its answer
        try:
            chunk = sock.recv(65536)
        except (ConnectionResetError, TimeoutError):
            break
        if not chunk:
            break
        answer += chunk
    return answer


def problem_of(answer: bytes) -> tuple[int, dict]:
    head, _, body = answer.partition(b"\r\n\r\n")
    assert b"content-type: application/problem+json" in head.lower(), head
    return int(head.split(b" ", 2)[1]), json.loads(body)


#: uvicorn's own command line serving the app factory with the guarded protocol (README, "Serving").
UVICORN = [
    "-m",
    "uvicorn",
    "service.api.app:create_app",
    "--factory",
    "--http",
    "service.api.protocol:GuardedH11Protocol",
    "--host",
    "127.0.0.1",
    "--port",
    "{port}",
]


@pytest.mark.parametrize("command", [None, UVICORN], ids=["movecast-serve", "uvicorn-factory"])
def test_trickled_headers_and_missing_bodies_are_cut_off_and_excess_connections_refused(tmp_path, command):
    with live_server(
        tmp_path, command=command, read_timeout_seconds="1", max_connections="8", solver_processes="1"
    ) as server:
        address = (server.host, server.port)
        # Headers a byte at a time, slower than the deadline allows in total: 408, closed.
        with socket.create_connection(address, timeout=20) as sock:
            request = b"GET /healthz HTTP/1.1\r\nHost: x\r\nX-Slow: " + b"a" * 40
            for byte in request:  # bounded: at most 60 bytes, 0.05 s apart
                try:
                    sock.send(bytes([byte]))
                except (BrokenPipeError, ConnectionResetError):
                    break
                time.sleep(0.05)
            status, problem = problem_of(read_answer(sock))
            assert (status, problem["type"]) == (408, "urn:movecast:problem:request-timeout")
        # A body declared and never sent: 408 too (the app never sees a half body).
        with socket.create_connection(address, timeout=20) as sock:
            sock.sendall(
                b"POST /design HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\nContent-Length: 500\r\n\r\n{"
            )
            status, problem = problem_of(read_answer(sock))
            assert status == 408
        # A connection that sends nothing at all is closed too.
        with socket.create_connection(address, timeout=20) as sock:
            status, _ = problem_of(read_answer(sock))
            assert status == 408
        # More connections than the cap: the excess ones are told 503 with Retry-After at once.
        held = [socket.create_connection(address, timeout=20) for _ in range(8)]
        try:
            with socket.create_connection(address, timeout=20) as extra:
                answer = read_answer(extra)
                status, problem = problem_of(answer)
                assert status == 503 and problem["type"] == "urn:movecast:problem:too-many-connections"
                assert b"retry-after: 1" in answer.lower()
        finally:
            for sock in held:
                sock.close()
        # Still serving once they are gone (the held ones are closed by the deadline anyway).
        for _ in range(100):  # bounded
            try:
                if httpx.get(f"{server.base}/healthz", timeout=5).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            time.sleep(0.05)
        assert httpx.get(f"{server.base}/healthz", timeout=5).json()["status"] == "ok"


def test_the_readme_gives_the_uvicorn_command_these_tests_run():
    """The README's way of serving with uvicorn's own command is the one checked above."""
    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text(encoding="utf-8")
    assert "uvicorn service.api.app:create_app --factory" in readme
    assert "--http service.api.protocol:GuardedH11Protocol" in readme


def test_the_readme_s_uvicorn_command_parses_as_written_without_any_setting(tmp_path):
    """The README's uvicorn command, expanded by a shell with no ``MOVECAST_*`` variable set, is
    taken by uvicorn's own option parser (click), which checks every option's type.

    With ``--timeout-keep-alive "$MOVECAST_KEEP_ALIVE_SECONDS"`` an unset variable had expanded to
    '' and uvicorn stopped at once ("'' is not a valid integer").
    """
    import os
    import re
    import shlex
    import subprocess

    from uvicorn.main import main as uvicorn_main

    readme = (Path(__file__).resolve().parents[2] / "README.md").read_text(encoding="utf-8")
    (block,) = [b for b in re.findall(r"```sh\n(.+?)\n```", readme, flags=re.S) if "GuardedH11Protocol" in b]
    command = block.replace("\\\n", " ")
    env = {name: value for name, value in os.environ.items() if not name.startswith("MOVECAST_")}
    # the shell expands the variables; printf prints each word it would pass on a line of its own
    expanded = subprocess.run(
        ["sh", "-c", "printf '%s\\0' " + command], env=env, capture_output=True, check=True, timeout=30
    ).stdout.decode()
    words = expanded.split("\0")[:-1]
    assert words[:2] == ["OMP_NUM_THREADS=1", "uvicorn"], shlex.join(words)
    with uvicorn_main.make_context("uvicorn", words[2:]) as context:
        params = context.params
    assert params["factory"] is True and params["http"] == "service.api.protocol:GuardedH11Protocol"
    assert params["timeout_keep_alive"] == 5  # MOVECAST_KEEP_ALIVE_SECONDS's default
    assert not params["access_log"]
