"""Hostile input against a real server on loopback: every answer is a problem with the right status.

One ``movecast serve`` process (API keys and one CORS origin configured) receives a catalogue of
malformed, oversized, deeply nested, mistyped and adversarial requests.  Each must be answered
with RFC 9457 problem details (``application/problem+json``) of the expected status and kind,
naming the field at fault by JSON pointer where there is one, with no traceback or server path.
Raw-socket cases cover what the HTTP layer itself refuses (``Content-Length: abc``).
The server is alive and answers a valid design afterwards.
"""

from __future__ import annotations

import copy
import json
import os
import socket
from dataclasses import dataclass, field
from typing import Any

import httpx
import pytest

from service.pipeline.examples import load_example
from tests.api.live import live_server

pytestmark = pytest.mark.skipif(os.name != "posix", reason="POSIX process groups")

KEY = "hostile-suite-key-0123456789"
AUTH = {"Authorization": f"Bearer {KEY}"}
JSON = {"content-type": "application/json", **AUTH}
ALLOWED_ORIGIN = "https://dashboard.example"
BODY_LIMIT = 1_048_576


def design(**edits: Any) -> dict[str, Any]:
    body = copy.deepcopy(load_example("design_request.json"))
    for path, value in edits.items():
        *parents, last = path.split("__")
        target = body
        for part in parents:
            target = target[int(part)] if isinstance(target, list) else target[part]
        if isinstance(target, list):
            target[int(last)] = value
        else:
            target[last] = value
    return body


def transfer(**element: Any) -> dict[str, Any]:
    body = copy.deepcopy(load_example("design_request_transfer_matrix.json"))
    body["model"]["elements"][0][0].update(element)
    return body


def raw(value: Any) -> bytes:
    return json.dumps(value, separators=(",", ":")).encode("utf-8")


@dataclass
class Case:
    name: str
    status: int
    kind: str
    body: bytes | None = None
    method: str = "POST"
    path: str = "/design"
    headers: dict[str, str] = field(default_factory=lambda: dict(JSON))
    pointer: str | None = None


def catalogue() -> list[Case]:
    cases: list[Case] = []
    add = cases.append
    example = raw(design())

    # --- malformed JSON: 400
    for name, body in [
        ("truncated", example[:-5]),
        ("trailing garbage", example + b" }"),
        ("single quotes", b"{'model': 1}"),
        ("a comment", b'{"model": 1 /* hi */}'),
        ("a bare word", b"designme"),
        ("trailing comma", b'{"horizons": {"prediction": 3,}}'),
        ("unclosed string", b'{"model": "abc'),
        ("control character in a string", b'{"model": "a\x01b"}'),
        ("hex number", b'{"horizons": {"prediction": 0x10}}'),
        ("leading zero", b'{"horizons": {"prediction": 010}}'),
        ("plus sign", b'{"horizons": {"prediction": +1}}'),
        ("two documents", example + example),
        ("only whitespace and a brace", b"  {  "),
        ("nested arrays 100000 deep", b"[" * 100_000 + b"]" * 100_000),
        ("nested objects 50000 deep", b'{"a":' * 50_000 + b"1" + b"}" * 50_000),
        ("nested arrays under a field", b'{"model": {"a": ' + b"[" * 20_000 + b"]" * 20_000 + b"}}"),
    ]:
        add(Case(f"malformed: {name}", 400, "malformed-body", body))
    for name, body in [
        ("a lone continuation byte", b'{"model": "\x80"}'),
        ("a truncated two-byte sequence", b'{"model": "\xc3"}'),
        ("an overlong encoding", b'{"model": "\xc0\xaf"}'),
        ("a surrogate encoded in UTF-8", b'{"model": "\xed\xa0\x80"}'),
        ("latin-1 text", '{"model": "température"}'.encode("latin-1")),
        ("UTF-16", '{"model": 1}'.encode("utf-16")),
        ("a byte 0xff", b"\xff" + example),
    ]:
        add(Case(f"invalid UTF-8: {name}", 400, "malformed-body", body))

    # --- content types: 415
    for content_type in [
        "text/plain",
        "application/xml",
        "text/xml",
        "application/x-www-form-urlencoded",
        "multipart/form-data; boundary=xyz",
        "application/octet-stream",
        "text/json",
        "application/json; charset=latin-1",
        "application/jsonx",
        "",
    ]:
        headers = {**AUTH, "content-type": content_type} if content_type else dict(AUTH)
        add(Case(f"content type {content_type or '(none)'}", 415, "unsupported-media-type", example, headers=headers))
    add(
        Case(
            "content type on /simulate",
            415,
            "unsupported-media-type",
            example,
            path="/simulate",
            headers={**AUTH, "content-type": "text/plain"},
        )
    )
    add(
        Case(
            "content type on /design/batch",
            415,
            "unsupported-media-type",
            example,
            path="/design/batch",
            headers={**AUTH, "content-type": "application/xml"},
        )
    )
    add(
        Case(
            "content type on /design/sweep",
            415,
            "unsupported-media-type",
            example,
            path="/design/sweep",
            headers={**AUTH, "content-type": "application/x-www-form-urlencoded"},
        )
    )

    # --- mistyped fields: 422 with a pointer
    typed = [
        ("model is a string", design(model="state space"), "/model"),
        ("a is a string", design(model__a="identity"), "/model/a"),
        ("a row is a number", design(model__a__0=1.0), "/model/a/0"),
        ("an entry is a string", design(model__a__0__0="0.9"), "/model/a/0/0"),
        ("an entry is true", design(model__a__0__0=True), "/model/a/0/0"),
        ("an entry is null", design(model__a__0__0=None), "/model/a/0/0"),
        ("an entry is an object", design(model__a__0__0={"value": 1}), "/model/a/0/0"),
        ("an entry is 1e400", None, "/model/a/0/0"),
        ("an entry is NaN", None, "/model/a/0/0"),
        ("an entry is Infinity", None, "/model/a/0/0"),
        ("an entry is -Infinity", None, "/model/a/0/0"),
        ("prediction is a string", design(horizons__prediction="30"), "/horizons/prediction"),
        ("prediction is a float", design(horizons__prediction=30.5), "/horizons/prediction"),
        ("prediction is 30.0", design(horizons__prediction=30.0), "/horizons/prediction"),
        ("prediction is true", design(horizons__prediction=True), "/horizons/prediction"),
        ("prediction is a 400-digit integer", None, "/horizons/prediction"),
        ("prediction is a 5000-digit integer", None, "/horizons/prediction"),
        ("prediction is negative", design(horizons__prediction=-3), "/horizons/prediction"),
        ("prediction is zero", design(horizons__prediction=0), "/horizons/prediction"),
        ("control is null", design(horizons__control=None), "/horizons/control"),
        ("sample time is zero", design(model__sample_time=0), "/model/sample_time"),
        ("sample time is negative", design(model__sample_time=-1), "/model/sample_time"),
        ("sample time is a string", design(model__sample_time="1 s"), "/model/sample_time"),
        ("time domain unknown", design(model__time_domain="laplace"), "/model/time_domain"),
        ("kind unknown", design(model__kind="neural"), "/model/kind"),
        ("kind missing", None, "/model/kind"),
        ("weights output is an object", design(weights__output={"a": 1}), "/weights/output"),
        ("weights move is a string", design(weights__move="0.1"), "/weights/move"),
        ("unknown top-level field", None, "/extra"),
        ("unknown model field", None, "/model/e"),
        ("misspelt horizons field", None, "/horizons/predictoin"),
        ("horizons missing", None, "/horizons"),
        ("weights missing", None, "/weights"),
        ("a is empty", design(model__a=[]), "/model/a"),
        ("a row is empty", design(model__a__0=[]), "/model/a/0"),
        ("output weight is empty", design(weights__output=[]), "/weights/output"),
        ("move weight is empty", design(weights__move=[]), "/weights/move"),
        ("sampled_model is 1", design(analysis={"sampled_model": 1}), "/analysis/sampled_model"),
        ("sampled_model is 0", design(analysis={"sampled_model": 0}), "/analysis/sampled_model"),
        ('sampled_model is "yes"', design(analysis={"sampled_model": "yes"}), "/analysis/sampled_model"),
        ('sampled_model is "true"', design(analysis={"sampled_model": "true"}), "/analysis/sampled_model"),
        ("frequency is 1", design(analysis={"frequency": 1}), "/analysis/frequency"),
        ("integrating is 1", transfer(integrating=1), "/model/elements/0/0/integrating"),
        ('integrating is "false"', transfer(integrating="false"), "/model/elements/0/0/integrating"),
        ("dead time negative", transfer(dead_time=-1.0), "/model/elements/0/0/dead_time"),
        ("dead time 1e308", transfer(dead_time=1e308), "/model/elements/0/0/dead_time"),
        ("dead time 1e20", transfer(dead_time=1e20), "/model/elements/0/0/dead_time"),
        ("gain is a string", transfer(gain="0.8"), "/model/elements/0/0/gain"),
        ("three time constants", transfer(time_constants=[1.0, 2.0, 3.0]), "/model/elements/0/0/time_constants"),
        ("a time constant of zero", transfer(time_constants=[0.0]), "/model/elements/0/0/time_constants/0"),
        ("A not square", design(model__a=[[1.0, 2.0]]), "/model/a"),
        ("B of the wrong height", design(model__b=[[1.0, 0.0]]), "/model/b"),
        ("prediction beyond the cap", design(horizons__prediction=5000), "/horizons/prediction"),
        ("control longer than prediction", design(horizons__control=31), "/horizons/control"),
        ("negative output weight", design(weights__output=[1.0, -2.0]), "/weights/output/1"),
        ("hard_outputs is 1", design(limits={"hard_outputs": 1}), "/limits/hard_outputs"),
    ]
    specials = {
        "an entry is 1e400": example.replace(b"0.92", b"1e400", 1),
        "an entry is NaN": example.replace(b"0.92", b"NaN", 1),
        "an entry is Infinity": example.replace(b"0.92", b"Infinity", 1),
        "an entry is -Infinity": example.replace(b"0.92", b"-Infinity", 1),
        "prediction is a 400-digit integer": example.replace(b'"prediction":30', b'"prediction": ' + b"9" * 400),
        "prediction is a 5000-digit integer": example.replace(b'"prediction":30', b'"prediction": ' + b"9" * 5000),
        "kind missing": raw({**design(), "model": {k: v for k, v in design()["model"].items() if k != "kind"}}),
        "unknown top-level field": raw({**design(), "extra": 1}),
        "unknown model field": raw({**design(), "model": {**design()["model"], "e": [[1.0]]}}),
        "misspelt horizons field": raw({**design(), "horizons": {"predictoin": 30, "control": 5}}),
        "horizons missing": raw({k: v for k, v in design().items() if k != "horizons"}),
        "weights missing": raw({k: v for k, v in design().items() if k != "weights"}),
    }
    for name, body in specials.items():
        assert body != example, name
    for name, body, where in typed:
        add(Case(f"mistyped: {name}", 422, "invalid-request", specials.get(name) or raw(body), pointer=where))

    # --- duplicate member names: 422 naming the member
    add(
        Case(
            "duplicate: top-level horizons",
            422,
            "invalid-request",
            example[:-1] + b', "horizons": {"prediction": 3, "control": 1}}',
            pointer="/horizons",
        )
    )
    add(
        Case(
            "duplicate: a inside model",
            422,
            "invalid-request",
            example.replace(b'"kind":"state_space"', b'"kind":"state_space","a":[[1.0]]', 1),
            pointer="/model/a",
        )
    )
    add(
        Case(
            "duplicate: prediction",
            422,
            "invalid-request",
            example.replace(b'"prediction":30', b'"prediction":30,"prediction":3'),
            pointer="/horizons/prediction",
        )
    )

    # --- the wrong shape of the whole body
    for name, body in [
        ("an array", b"[]"),
        ("a string", b'"design"'),
        ("null", b"null"),
        ("a number", b"42"),
        ("an empty object", b"{}"),
    ]:
        add(
            Case(f"body is {name}", 422, "invalid-request", body, pointer="" if name != "an empty object" else "/model")
        )
    add(Case("empty body", 422, "invalid-request", b"", pointer=""))

    # --- amplification: many bad entries, a capped answer
    add(
        Case(
            "150000 bad matrix entries",
            422,
            "invalid-request",
            raw(design(model__a=[["x"]] * 150_000)),
            pointer="/model/a/0/0",
        )
    )
    add(
        Case(
            "many bad events",
            422,
            "invalid-request",
            raw({**design(), "scenario": {"steps": 10, "setpoint_changes": [{"step": "x"}] * 5000}}),
            path="/simulate",
            pointer=None,
        )
    )

    # --- oversized: 413
    add(Case("body over the limit", 413, "payload-too-large", b"[" * (BODY_LIMIT + 10)))

    # --- other endpoints
    add(
        Case(
            "batch envelope not a list",
            422,
            "invalid-request",
            raw({"items": {"id": "x"}}),
            path="/design/batch",
            pointer="/items",
        )
    )
    add(Case("batch with no items", 422, "invalid-request", raw({"items": []}), path="/design/batch", pointer="/items"))
    add(
        Case(
            "batch items a string",
            422,
            "invalid-request",
            raw({"items": "all of them"}),
            path="/design/batch",
            pointer="/items",
        )
    )
    add(
        Case(
            "batch item id empty",
            422,
            "invalid-request",
            raw({"items": [{"id": "", "request": {}}]}),
            path="/design/batch",
            pointer="/items/0/id",
        )
    )
    add(
        Case(
            "sweep values empty",
            422,
            "invalid-request",
            raw({"design": design(), "parameter": "control", "values": []}),
            path="/design/sweep",
            pointer="/values",
        )
    )
    add(
        Case(
            "sweep parameter unknown",
            422,
            "invalid-request",
            raw({"design": design(), "parameter": "gain", "values": [1]}),
            path="/design/sweep",
            pointer="/parameter",
        )
    )
    add(
        Case(
            "simulate steps a string",
            422,
            "invalid-request",
            raw({**design(), "scenario": {"steps": "100"}}),
            path="/simulate",
            pointer="/scenario/steps",
        )
    )
    add(
        Case(
            "simulate steps beyond the cap",
            422,
            "invalid-request",
            raw({**design(), "scenario": {"steps": 10**7}}),
            path="/simulate",
            pointer="/scenario/steps",
        )
    )

    # --- authentication: 401
    add(Case("no key", 401, "unauthorized", example, headers={"content-type": "application/json"}))
    add(
        Case(
            "wrong key",
            401,
            "unauthorized",
            example,
            headers={"content-type": "application/json", "Authorization": "Bearer nope-nope-nope"},
        )
    )
    add(
        Case(
            "basic scheme",
            401,
            "unauthorized",
            example,
            headers={"content-type": "application/json", "Authorization": f"Basic {KEY}"},
        )
    )
    add(Case("no key on /metrics", 401, "unauthorized", None, method="GET", path="/metrics", headers={}))

    # --- methods and paths
    add(Case("GET /design", 405, "http-error", None, method="GET"))
    add(Case("DELETE /design", 405, "http-error", None, method="DELETE"))
    add(Case("made-up method", 405, "http-error", None, method="M000001X", path="/healthz", headers={}))
    add(Case("unknown path", 404, "http-error", None, method="GET", path="/no/such/thing"))
    add(Case("path traversal", 404, "http-error", None, method="GET", path="/../../etc/passwd"))
    add(Case("POST /healthz", 405, "http-error", example, path="/healthz"))

    # --- CORS: a refused preflight is a problem too
    add(
        Case(
            "preflight from a foreign origin",
            403,
            "forbidden-origin",
            None,
            method="OPTIONS",
            headers={"Origin": "https://attacker.example", "Access-Control-Request-Method": "POST"},
        )
    )
    add(
        Case(
            "preflight with a refused method",
            403,
            "forbidden-origin",
            None,
            method="OPTIONS",
            headers={"Origin": ALLOWED_ORIGIN, "Access-Control-Request-Method": "DELETE"},
        )
    )
    add(
        Case(
            "preflight with a refused header",
            403,
            "forbidden-origin",
            None,
            method="OPTIONS",
            headers={
                "Origin": ALLOWED_ORIGIN,
                "Access-Control-Request-Method": "POST",
                "Access-Control-Request-Headers": "x-evil",
            },
        )
    )
    return cases


CASES = catalogue()

RAW_CASES = [
    (
        "declared over the limit",
        b"POST /design HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n"
        b"Authorization: Bearer " + KEY.encode() + b"\r\nContent-Length: 4194304\r\n\r\n{}",
    ),
    ("Content-Length not a number", b"POST /design HTTP/1.1\r\nHost: x\r\nContent-Length: abc\r\n\r\n{}"),
    (
        "two different Content-Lengths",
        b"POST /design HTTP/1.1\r\nHost: x\r\nContent-Length: 2\r\nContent-Length: 3\r\n\r\n{}",
    ),
    ("negative Content-Length", b"POST /design HTTP/1.1\r\nHost: x\r\nContent-Length: -1\r\n\r\n{}"),
    (
        # framed two ways (request smuggling); found in an audit of hostile input: answered 200 as
        # chunked with the connection kept open, where RFC 9112, section 6.3, requires it closed
        "both Content-Length and Transfer-Encoding",
        b"POST /design HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\nContent-Length: 5\r\n"
        b"Transfer-Encoding: chunked\r\n\r\n2\r\n{}\r\n0\r\n\r\n",
    ),
    ("a header line without a colon", b"GET /healthz HTTP/1.1\r\nHost: x\r\nnot a header\r\n\r\n"),
    ("a garbage request line", b"\x16\x03\x01\x02\x00\x01\x00\x01\xfc\x03\x03\r\n\r\n"),
    ("no Host header", b"GET /healthz HTTP/1.1\r\n\r\n"),
    ("a NUL byte in a header", b"GET /healthz HTTP/1.1\r\nHost: x\r\nX-Bad: a\x00b\r\n\r\n"),
    ("a space before the colon", b"GET /healthz HTTP/1.1\r\nHost : x\r\n\r\n"),
]


def assert_case_refused(response: httpx.Response, case: Case) -> None:
    assert response.status_code == case.status, (case.name, response.status_code, response.text[:300])
    assert response.headers.get("content-type", "").startswith("application/problem+json"), (
        case.name,
        response.headers,
    )
    body = response.json()
    assert body["status"] == case.status and body["type"] == f"urn:movecast:problem:{case.kind}", (case.name, body)
    assert {"title", "detail", "instance", "errors"} <= set(body), case.name
    assert len(body["errors"]) <= 50, case.name
    assert len(response.content) < 64_000, (case.name, len(response.content))
    text = response.text
    assert "Traceback" not in text and ".py" not in text and "/site-packages" not in text, case.name
    if case.pointer is not None:
        pointers = [e["pointer"] for e in body["errors"]]
        assert case.pointer in pointers, (case.name, pointers)


def raw_exchange(host: str, port: int, request: bytes) -> bytes:
    """Send raw bytes; return the first response (head and its Content-Length of body)."""
    with socket.create_connection((host, port), timeout=10) as sock:
        sock.sendall(request)
        answer = b""
        for _ in range(100):  # bounded
            chunk = sock.recv(65536)
            if not chunk:
                break
            answer += chunk
            head, sep, body = answer.partition(b"\r\n\r\n")
            length = [
                line.split(b":", 1)[1] for line in head.lower().split(b"\r\n") if line.startswith(b"content-length:")
            ]
            if sep and length and len(body) >= int(length[0]):
                break
        return answer


def test_the_catalogue_is_large():
    assert len(CASES) + len(RAW_CASES) >= 100


def test_every_hostile_request_gets_a_problem_with_its_status_and_pointer(tmp_path):
    with live_server(tmp_path, api_keys=KEY, cors_origins=ALLOWED_ORIGIN, solver_processes="1") as server:
        failures = []
        with httpx.Client(base_url=server.base, timeout=60) as client:
            for case in CASES:
                response = client.request(case.method, case.path, content=case.body, headers=case.headers)
                try:
                    assert_case_refused(response, case)
                except AssertionError as exc:
                    failures.append(str(exc)[:400])
            for name, request in RAW_CASES:
                answer = raw_exchange(server.host, server.port, request)
                head, _, body = answer.partition(b"\r\n\r\n")
                status = 413 if "over the limit" in name else 400
                try:
                    assert head.startswith(f"HTTP/1.1 {status}".encode()), (name, head[:80])
                    assert b"content-type: application/problem+json" in head.lower(), (name, head)
                    assert status != 400 or b"connection: close" in head.lower(), (name, head)
                    problem = json.loads(body)
                    assert problem["status"] == status and problem["type"].startswith("urn:movecast:problem:"), name
                except (AssertionError, ValueError) as exc:
                    failures.append(f"{name}: {exc}"[:400])
            assert not failures, "\n".join(failures)
            # Still serving, and still right.
            assert client.get("/healthz").status_code == 200
            answer = client.post("/design", json=design(), headers=AUTH)
            assert answer.status_code == 200 and answer.json()["closed_loop"]["stable"] is True
