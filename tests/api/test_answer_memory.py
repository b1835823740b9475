"""The answers the serving process holds at once are bounded in bytes (service/api/answer_memory.py).

- the ledger: room is taken and given back, a request that does not fit waits, and gives up at
  its deadline or when its client leaves;
- an answer larger than the whole bound is a 422 naming the fields that drive it;
- a request holds its answer's bytes until its last byte is sent, so a slow reader keeps
  another large answer waiting (503 ``busy`` at its time limit), and the bytes come back after;
- the estimate of those bytes bounds what ``tracemalloc`` measures in this process for whole
  requests (the solver runs in a process of its own, so what is measured here is the serving
  side, plus the test client's copy of the answer).
"""

from __future__ import annotations

import asyncio
import copy
import json
import os
import subprocess
import sys
import threading
import time
import tracemalloc
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient

from service.api.answer_memory import AnswerHold, AnswerMemory
from service.api.app import create_app
from service.api.serving import MMAP_THRESHOLD_BYTES, return_large_blocks
from service.api.settings import Settings
from service.errors import AnswerMemoryFull, Cancelled, InvalidRequest
from service.pipeline.caps import Caps
from service.pipeline.examples import load_example
from service.pipeline.memory import check_request_memory, request_memory
from service.schemas.batch import BatchRequest
from service.schemas.design import DesignRequest
from service.schemas.simulate import SimulateRequest
from tests.api.conftest import assert_problem
from tests.conftest import random_design_request

MIB = 1024 * 1024


def test_room_is_taken_and_given_back_and_a_request_that_does_not_fit_waits_for_it():
    memory = AnswerMemory(100)
    memory.reserve(60, deadline=time.monotonic() + 5, seconds=5)
    assert memory.held == 60
    got = threading.Event()

    def second() -> None:
        memory.reserve(50, deadline=time.monotonic() + 10, seconds=10)
        got.set()

    waiter = threading.Thread(target=second)
    waiter.start()
    assert not got.wait(0.3)  # 60 + 50 > 100: it waits
    memory.release(60)
    waiter.join(timeout=5)
    assert got.is_set() and memory.held == 50
    memory.release(50)
    assert memory.held == 0


def test_a_wait_ends_at_the_deadline_or_when_the_client_leaves():
    memory = AnswerMemory(100)
    memory.reserve(100, deadline=time.monotonic() + 5, seconds=5)
    with pytest.raises(AnswerMemoryFull) as caught:
        memory.reserve(1, deadline=time.monotonic() + 0.1, seconds=0.1)
    assert (caught.value.held, caught.value.limit) == (100, 100)
    cancel = threading.Event()
    cancel.set()
    with pytest.raises(Cancelled):
        memory.reserve(1, deadline=time.monotonic() + 5, seconds=5, cancel=cancel)
    assert memory.held == 100  # neither took anything


def test_a_hold_reserves_only_what_it_does_not_hold_yet_and_releases_once():
    memory = AnswerMemory(1000)
    hold = AnswerHold(memory)
    deadline = time.monotonic() + 5
    hold.take(300, deadline=deadline, seconds=5)
    hold.take(200, deadline=deadline, seconds=5)  # a later call of the same request, smaller
    assert memory.held == 300
    hold.take(450.5, deadline=deadline, seconds=5)
    assert memory.held == hold.held == 450
    hold.release()
    hold.release()
    assert memory.held == 0


def test_an_answer_larger_than_the_whole_bound_is_a_422_naming_its_horizons():
    body = random_design_request(np.random.default_rng(3), states=10, signals=20, prediction=100, control=1)
    request = DesignRequest.model_validate(body)
    served = request_memory(request).served
    assert served > MIB  # 40 000 gain entries at 64 bytes, in this process
    caps = Caps(max_answer_memory_bytes=MIB)
    with pytest.raises(InvalidRequest) as caught:
        check_request_memory(request, caps)
    assert [p.pointer for p in caught.value.problems] == ["/horizons/control", "/horizons/prediction"]
    assert "serving process" in caught.value.problems[0].detail
    assert check_request_memory(request, Caps()) is not None  # the default holds it


def test_a_request_past_a_size_cap_holds_no_answer_memory_and_gets_its_own_422(make_client, example):
    """Its answer is never computed: it must not wait for room (it would get a 503, not its 422)."""
    caps = Caps(max_answer_memory_bytes=MIB, max_prediction_horizon=100)
    past = copy.deepcopy(example)
    past["horizons"]["prediction"] = 101
    estimate = check_request_memory(DesignRequest.model_validate(past), caps)
    assert estimate is not None and estimate.served == 0 and estimate.bytes > 0
    client = make_client(max_answer_memory_bytes=MIB, max_prediction_horizon=100, request_timeout_seconds=1.0)
    memory = client.app.state.answer_memory
    memory.reserve(MIB, deadline=time.monotonic() + 5, seconds=5)  # every byte held by others
    try:
        body = assert_problem(client.post("/design", json=past), 422, "invalid-request")
        assert [e["pointer"] for e in body["errors"]] == ["/horizons/prediction"]
        assert_problem(client.post("/design", json=example), 503, "busy")  # a request that computes waits
    finally:
        memory.release(MIB)
    assert client.post("/design", json=example).status_code == 200


def test_over_http_the_422_names_the_fields_and_a_small_design_is_answered(make_client, example):
    client = make_client(max_answer_memory_bytes=MIB, answer_cache_bytes=0)
    big = random_design_request(np.random.default_rng(3), states=10, signals=20, prediction=100, control=1)
    body = assert_problem(client.post("/design", json=big), 422, "invalid-request")
    assert {e["pointer"] for e in body["errors"]} == {"/horizons/control", "/horizons/prediction"}
    assert "at once" in body["errors"][0]["detail"]
    assert client.post("/design", json=example).status_code == 200
    assert client.app.state.answer_memory.held == 0


def test_a_batch_whose_answers_together_exceed_the_bound_is_a_422_on_its_items(make_client):
    client = make_client(max_answer_memory_bytes=MIB, answer_cache_bytes=0)
    item = random_design_request(np.random.default_rng(4), states=6, signals=10, prediction=60, control=1)
    batch = {"items": [{"id": f"grade-{k}", "request": item} for k in range(3)]}
    assert request_memory(BatchRequest.model_validate(batch)).served > MIB
    body = assert_problem(client.post("/design/batch", json=batch), 422, "invalid-request")
    assert [e["pointer"] for e in body["errors"]] == ["/items"]
    one = {"items": batch["items"][:1]}
    assert client.post("/design/batch", json=one).status_code == 200
    assert client.app.state.answer_memory.held == 0


def _post(path: str, body: dict[str, Any]) -> tuple[dict[str, Any], bytes]:
    raw = json.dumps(body).encode()
    scope = {
        "type": "http",
        "asgi": {"version": "3.0"},
        "http_version": "1.1",
        "method": "POST",
        "scheme": "http",
        "path": path,
        "raw_path": path.encode(),
        "root_path": "",
        "query_string": b"",
        "headers": [(b"content-type", b"application/json"), (b"content-length", str(len(raw)).encode())],
        "client": ("127.0.0.1", 50000),
        "server": ("127.0.0.1", 8000),
    }
    return scope, raw


def _receiver(raw: bytes) -> Any:
    """An ASGI ``receive``: the body once, then nothing (the client neither sends more nor leaves)."""
    delivered = False

    async def receive() -> dict[str, Any]:
        nonlocal delivered
        if not delivered:
            delivered = True
            return {"type": "http.request", "body": raw, "more_body": False}
        await asyncio.Event().wait()
        raise AssertionError("unreachable")

    return receive


def test_an_answer_is_held_until_its_last_byte_is_sent_and_a_slow_reader_keeps_others_waiting():
    """A client that does not read keeps its answer's bytes; the next large answer waits, then 503."""
    body = random_design_request(np.random.default_rng(5), states=8, signals=12, prediction=40, control=1)
    served = request_memory(DesignRequest.model_validate(body)).served
    limit = MIB
    assert limit / 2 < served <= limit  # one fits, two do not
    app = create_app(Settings(max_answer_memory_bytes=limit, answer_cache_bytes=0, request_timeout_seconds=1.0))
    memory = app.state.answer_memory
    sent_head = asyncio.Event()

    async def run() -> tuple[list[int], int, int]:
        reader_free = asyncio.Event()
        held_while_sending: list[int] = []

        async def post_design(gate: asyncio.Event | None = None) -> int:
            """One /design through the app; with ``gate``, a reader that takes no body until it is set."""
            scope, raw = _post("/design", body)
            status = 0

            async def send(message: dict[str, Any]) -> None:
                nonlocal status
                if message["type"] == "http.response.start":
                    status = message["status"]
                    if gate is not None:
                        sent_head.set()
                elif message["type"] == "http.response.body" and gate is not None:
                    held_while_sending.append(memory.held)
                    await gate.wait()

            await app(scope, _receiver(raw), send)
            return status

        slow = asyncio.ensure_future(post_design(reader_free))
        await asyncio.wait_for(sent_head.wait(), timeout=60)
        second = await asyncio.wait_for(post_design(), timeout=60)  # waits 1 s for room, then 503
        reader_free.set()
        first = await asyncio.wait_for(slow, timeout=60)
        after = memory.held
        third = await asyncio.wait_for(post_design(), timeout=60)
        return [first, second, third], held_while_sending[0], after

    statuses, held, after = asyncio.run(run())
    assert statuses == [200, 503, 200]
    assert held == int(served)  # held while the body was being sent
    assert after == 0 and memory.held == 0


def _serving_peak(client: TestClient, path: str, body: dict[str, Any]) -> tuple[int, int]:
    raw = json.dumps(body).encode()
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        response = client.post(path, content=raw, headers={"content-type": "application/json"})
        peak = tracemalloc.get_traced_memory()[1] - base
    finally:
        tracemalloc.stop()
    assert response.status_code == 200, response.text[:500]
    return peak, len(response.content)


def test_the_estimate_bounds_what_the_serving_process_holds():
    """tracemalloc over whole requests in this process (the solver's own memory is elsewhere)."""
    design = random_design_request(np.random.default_rng(6), states=10, signals=30, prediction=100, control=1)
    run = copy.deepcopy(load_example("simulate_request.json"))
    run["scenario"]["steps"] = 20_000
    batch = {"items": [{"id": "a", "request": design}, {"id": "b", "request": design}]}
    cases = [
        ("/design", design, request_memory(DesignRequest.model_validate(design))),
        ("/simulate", run, request_memory(SimulateRequest.model_validate(run))),
        ("/design/batch", batch, request_memory(BatchRequest.model_validate(batch))),
    ]
    with TestClient(create_app(Settings(answer_cache_bytes=0))) as client:
        client.post("/design", json=load_example("design_request.json"))  # solver and imports warm
        for path, body, estimate in cases:
            peak, size = _serving_peak(client, path, body)
            assert size > MIB  # large enough for the per-number figures to matter
            assert peak <= estimate.served, (path, peak, estimate.served)


#: Run in a fresh interpreter: build an answer-sized block in three worker threads one after
#: another, free each, and print the resident memory before and after (kB, /proc).
_THREADED_BLOCKS = """
import sys, threading
from pathlib import Path
from service.api.serving import return_large_blocks
def rss():
    line = [l for l in Path("/proc/self/status").read_text().splitlines() if l.startswith("VmRSS")][0]
    return int(line.split()[1])
if sys.argv[1] == "fixed":
    assert return_large_blocks()
def build():
    for size in (24, 28, 32):
        block = b"x" * (size * 1024 * 1024)
        del block
before = rss()
for _ in range(3):
    worker = threading.Thread(target=build)
    worker.start()
    worker.join()
print(before, rss())
"""


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc's mallopt and /proc")
def test_with_the_threshold_fixed_large_answers_freed_go_back_to_the_system():
    """glibc's own rule (malloc(3), M_MMAP_THRESHOLD): a block above the threshold is mapped alone."""
    if not return_large_blocks(MMAP_THRESHOLD_BYTES):
        pytest.skip("not glibc")
    env = {k: v for k, v in os.environ.items() if k != "MALLOC_MMAP_THRESHOLD_"}
    done = subprocess.run(
        [sys.executable, "-c", _THREADED_BLOCKS, "fixed"], capture_output=True, text=True, timeout=60, env=env
    )
    before, after = map(int, done.stdout.split())
    assert after - before < 8 * 1024, done.stdout  # kB: back near rest, not 24-32 MiB above it


def test_each_serving_process_fixes_the_threshold_at_start_up(monkeypatch):
    from service.api import operations

    calls: list[int] = []
    monkeypatch.setattr(operations, "return_large_blocks", lambda: calls.append(1) or True)
    with TestClient(create_app(Settings())) as client:
        assert client.get("/healthz").status_code == 200
    assert calls == [1]


def test_a_client_that_stops_reading_is_dropped_and_its_answer_memory_comes_back(tmp_path):
    """The stall deadline (service/api/protocol.py): no byte taken for send_stall_seconds, dropped."""
    import socket

    import httpx

    from tests.api.live import live_server, metric

    body = random_design_request(np.random.default_rng(7), states=10, signals=50, prediction=200, control=1)
    payload = json.dumps(body).encode()
    request = (
        b"POST /design HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\nCache-Control: no-store\r\n"
        + f"Content-Length: {len(payload)}\r\n\r\n".encode()
        + payload
    )
    with live_server(tmp_path, send_stall_seconds="1", solver_processes="1") as server:
        with socket.socket() as sock:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)  # a reader that takes little
            sock.settimeout(60)
            sock.connect((server.host, server.port))
            sock.sendall(request)
            head = sock.recv(1024)  # the status line arrives; then the client reads no more
            assert head.startswith(b"HTTP/1.1 200"), head[:200]
            length = int(head.split(b"content-length: ", 1)[1].split(b"\r\n", 1)[0])
            assert length > 10 * MIB  # far more than the sockets' buffers hold
            held = most = 0.0
            for _ in range(300):  # bounded: until the server has dropped the connection
                text = httpx.get(f"{server.base}/metrics", timeout=10).text
                held = metric(text, "movecast_answer_memory_bytes")
                most = max(most, held)
                if "connection dropped" in server.log_text() and held == 0:
                    break
                time.sleep(0.05)
            assert "the client took none of the response for 1 s; connection dropped" in server.log_text()
            assert most > 10 * MIB and held == 0  # held while the client did not read, back with the drop
            received = len(head)
            try:
                while chunk := sock.recv(1 << 20):
                    received += len(chunk)
            except ConnectionResetError:
                pass
            assert received < length  # the answer was cut off, not sent whole
        # A client that reads gets the same large answer whole, and nothing stays held.
        answer = httpx.post(f"{server.base}/design", json=body, headers={"Cache-Control": "no-store"}, timeout=120)
        assert answer.status_code == 200 and len(answer.content) == int(answer.headers["content-length"])
        text = httpx.get(f"{server.base}/metrics", timeout=10).text
        assert metric(text, "movecast_answer_memory_bytes") == 0
