"""Request ids, one JSON log line per request, no traceback in any response, readiness on SIGTERM."""

from __future__ import annotations

import io
import json
import logging
import re
import signal

import pytest
from fastapi import FastAPI
from fastapi.testclient import TestClient

from service.api import Settings, create_app
from service.api.logs import JsonFormatter, RequestIdFilter, logging_config
from service.api.middleware import RequestContextMiddleware, sane_request_id
from service.api.operations import _sigterm_hook
from tests.api.conftest import KEY, assert_problem

GENERATED = re.compile(r"[0-9a-f]{32}")


@pytest.fixture
def log_lines():
    """JSON lines written by the service's loggers while the test runs."""
    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(JsonFormatter())
    handler.addFilter(RequestIdFilter())
    logger = logging.getLogger("movecast")
    logger.addHandler(handler)
    old = logger.level
    logger.setLevel(logging.INFO)
    yield lambda: [json.loads(line) for line in stream.getvalue().splitlines()]
    logger.removeHandler(handler)
    logger.setLevel(old)


@pytest.mark.parametrize("given", ["abc-123", "0f8fad5b-d9cb-469f-a165-70867728950e", "trace:01H.x_y", "a" * 128])
def test_a_sane_request_id_is_echoed(client, given):
    assert client.get("/healthz", headers={"X-Request-ID": given}).headers["x-request-id"] == given


@pytest.mark.parametrize("given", ["", "a" * 129, "has space", "semi;colon", "new\u00e9line", "<script>"])
def test_an_odd_request_id_is_replaced(client, given):
    echoed = client.get("/healthz", headers={"X-Request-ID": given.encode("utf-8")}).headers["x-request-id"]
    assert GENERATED.fullmatch(echoed)
    assert sane_request_id(given) is None


def test_every_response_carries_a_request_id_errors_included(make_client, example):
    client = make_client(api_keys=KEY, max_body_bytes=1024)
    auth = {"Authorization": f"Bearer {KEY}"}
    responses = [
        client.get("/healthz"),
        client.post("/design", json=example),  # 401
        client.post("/design", json=example, headers=auth),  # 200
        client.post("/design", json={}, headers=auth),  # 422
        client.post("/design", content=b"{", headers={**auth, "content-type": "application/json"}),  # 400
        client.post("/design", content=b" " * 2048, headers={**auth, "content-type": "application/json"}),  # 413
        client.get("/nowhere", headers=auth),  # 404
        client.get("/design", headers=auth),  # 405
    ]
    assert [r.status_code for r in responses] == [200, 401, 200, 422, 400, 413, 404, 405]
    ids = [r.headers["x-request-id"] for r in responses]
    assert all(GENERATED.fullmatch(i) for i in ids) and len(set(ids)) == len(ids)


def test_one_json_line_per_request_with_the_request_id(client, example, log_lines):
    r = client.post("/design", json=example, headers={"X-Request-ID": "job-7"})
    client.get("/healthz", headers={"X-Request-ID": "probe-1"})
    access = [line for line in log_lines() if line["logger"] == "movecast.access"]
    assert len(access) == 2
    design, health = access
    assert design["request_id"] == r.headers["x-request-id"] == "job-7"
    assert (design["method"], design["route"], design["status"]) == ("POST", "/design", 200)
    assert design["duration_ms"] >= 0 and design["client"] == "testclient"
    assert health["request_id"] == "probe-1" and health["route"] == "/healthz"


def test_an_unhandled_error_is_a_500_without_a_trace_and_logged_with_the_id(make_client, log_lines):
    client = make_client()

    def explode() -> None:
        raise RuntimeError("secret internal detail at /srv/app/module.py")

    client.app.add_api_route("/explode", explode)
    r = client.get("/explode", headers={"X-Request-ID": "boom-1"})
    body = assert_problem(r, 500, "internal-error")
    assert "secret" not in r.text and "RuntimeError" not in r.text and body["errors"] == []
    assert r.headers["x-request-id"] == "boom-1"
    errors = [line for line in log_lines() if line["level"] == "error"]
    assert errors and all(line["request_id"] == "boom-1" for line in errors)
    assert any("RuntimeError" in line.get("exception", "") for line in errors)
    (access,) = [line for line in log_lines() if line["logger"] == "movecast.access"]
    assert access["status"] == 500


def test_an_error_inside_middleware_is_a_500_problem_too(log_lines):
    async def broken_middleware(scope, receive, send):
        raise ValueError("middleware failed reading /etc/movecast/config")

    app = FastAPI()
    wrapped = RequestContextMiddleware(broken_middleware)

    async def outer(scope, receive, send):
        scope["app"] = app
        await wrapped(scope, receive, send)

    r = TestClient(outer, raise_server_exceptions=False).get("/anything", headers={"X-Request-ID": "mw-1"})
    assert_problem(r, 500, "internal-error")
    assert "/etc/" not in r.text and r.headers["x-request-id"] == "mw-1"
    assert any(line["request_id"] == "mw-1" and "ValueError" in line.get("exception", "") for line in log_lines())


def test_sigterm_turns_readiness_off_first_then_calls_the_servers_handler():
    app = create_app(Settings())
    app.state.ready = True
    called = []
    original = signal.signal(signal.SIGTERM, lambda signum, frame: called.append(signum))
    try:
        undo = _sigterm_hook(app)
        signal.raise_signal(signal.SIGTERM)
        assert app.state.ready is False and called == [signal.SIGTERM]
        undo()
        signal.raise_signal(signal.SIGTERM)
        assert called == [signal.SIGTERM, signal.SIGTERM]
    finally:
        signal.signal(signal.SIGTERM, original)


def test_logging_config_is_json_on_stderr_without_uvicorn_access_lines():
    config = logging_config("warning")
    assert config["handlers"]["stderr"]["formatter"] == "json"
    assert config["root"]["level"] == "WARNING"
    assert config["loggers"]["uvicorn.access"]["handlers"] == []
    assert config["loggers"]["uvicorn.access"]["propagate"] is False


def test_an_unhandled_error_logs_the_route_template_never_the_caller_s_path(make_client, log_lines):
    client = make_client()

    def explode(rest: str) -> None:
        raise RuntimeError("failed")

    client.app.add_api_route("/explode/{rest:path}", explode)
    odd = "x" * 8000 + "/%22%7D%20%7B%22level%22:%22forged"
    assert client.get(f"/explode/{odd}").status_code == 500
    errors = [line for line in log_lines() if line["level"] == "error"]
    assert errors
    for line in errors + [line for line in log_lines() if line["logger"] == "movecast.access"]:
        # the lines name the route, never the path: the caller chose the path
        assert line["route"] == "/explode/{rest:path}"
        assert "xxxx" not in json.dumps(line) and "forged" not in json.dumps(line)
