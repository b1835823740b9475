"""ASGI middleware: request ids, access log, request metrics, the last-resort 500, body limit,
large response bodies in pieces.

Each class is plain ASGI middleware (no ``BaseHTTPMiddleware``), so they stream and add
nothing per request but a few dictionary look-ups.  The order, outermost first, is set in
:mod:`service.api.operations`: body pieces, request context, CORS, API key, body limit, the app.
"""

from __future__ import annotations

import json
import logging
import re
import time
import uuid
from collections import OrderedDict
from typing import Any

from starlette.datastructures import Headers, MutableHeaders
from starlette.middleware.cors import CORSMiddleware
from starlette.responses import Response
from starlette.routing import BaseRoute, Match
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.api.logs import request_id_var
from service.api.metrics import IN_PROGRESS, REQUEST_SECONDS, REQUESTS, count_rejection
from service.api.problems import PROBLEM_JSON, problem_response
from service.errors import MalformedBody
from service.pipeline.problems import Problem, problem_of

try:  # FastAPI >= 0.150 keeps included routers as branches; this walks their routes
    from fastapi.routing import iter_route_contexts as _flatten
except ImportError:  # pragma: no cover - older FastAPI lists every route in app.routes
    _flatten = None  # type: ignore[assignment]

__all__ = [
    "REQUEST_ID_HEADER",
    "BodyChunkMiddleware",
    "BodyLimitMiddleware",
    "ProblemCORSMiddleware",
    "RequestContextMiddleware",
    "flat_routes",
    "method_label",
    "route_template",
    "sane_request_id",
]

REQUEST_ID_HEADER = "X-Request-ID"
#: A caller's request id is echoed when it is 1 to 128 of these characters (UUIDs, ULIDs,
#: trace ids); anything else is replaced by a fresh id, so logs never carry junk.
_SANE_ID = re.compile(r"[A-Za-z0-9._:-]{1,128}")
UNMATCHED = "<unmatched>"
#: Methods kept as metric labels; any other method is counted as :data:`OTHER_METHOD`, so a
#: caller cannot grow the label set (and /metrics) with made-up methods.
KNOWN_METHODS = frozenset({"GET", "HEAD", "POST", "PUT", "PATCH", "DELETE", "OPTIONS"})
OTHER_METHOD = "other"
#: Route templates kept per middleware, by request line: a request's template is found by
#: matching its path against every route (tens of microseconds), the same answer each time
#: for the same method and path.  Least recently used out, so made-up paths cannot grow it.
TEMPLATE_MEMO_SIZE = 1024
#: Largest problem body read back to find its kind for the rejection metric.
_PEEK_BYTES = 65_536

access_log = logging.getLogger("movecast.access")
error_log = logging.getLogger("movecast.errors")


def sane_request_id(value: str | None) -> str | None:
    """Return ``value`` when it is a usable request id, else ``None``."""
    return value if value is not None and _SANE_ID.fullmatch(value) else None


def flat_routes(routes: list[BaseRoute]) -> list[Any]:
    """Every route of an app, included routers walked through; each has ``path``, ``matches``."""
    return list(_flatten(routes)) if _flatten is not None else list(routes)


def method_label(method: str) -> str:
    """The metric label of an HTTP method: itself when standard, else ``other``."""
    return method if method in KNOWN_METHODS else OTHER_METHOD


def route_template(scope: Scope) -> str:
    """The path template of the route a request goes to (``/design``), or ``<unmatched>``."""
    app = scope.get("app")
    partial = None
    for route in flat_routes(getattr(app, "routes", [])):
        match, _ = route.matches(scope)
        if match is Match.FULL:
            return str(route.path)
        if match is Match.PARTIAL and partial is None:
            partial = str(route.path)
    return partial or UNMATCHED


class RequestContextMiddleware:
    """Give every request an id, log one line for it, count it, and never leak a traceback.

    - ``X-Request-ID``: the caller's when sane (:func:`sane_request_id`), else a new UUID;
      set on every response, errors included, and on every log line of the request.
    - One ``movecast.access`` line per request: method, route, status, duration_ms,
      request_id, client.
    - ``movecast_requests_total`` and ``movecast_request_duration_seconds`` by route
      template (``<unmatched>`` for any unknown path), method (``other`` for any non-standard
      one) and status; problem responses also count in ``movecast_rejected_requests_total``.
      Every label comes from a fixed set, so no request can add series.
    - An exception escaping the app (a handler, another middleware) is logged with its
      traceback and answered as a 500 problem without one.
    """

    def __init__(self, app: ASGIApp) -> None:
        self.app = app
        self._templates: OrderedDict[tuple[str, str, str], str] = OrderedDict()

    def _template(self, scope: Scope) -> str:
        """:func:`route_template` of the request, remembered by method, path and root path."""
        key = (scope.get("method", ""), scope.get("path", ""), scope.get("root_path", ""))
        template = self._templates.get(key)
        if template is None:
            template = self._templates[key] = route_template(scope)
            if len(self._templates) > TEMPLATE_MEMO_SIZE:
                self._templates.popitem(last=False)
        else:
            self._templates.move_to_end(key)
        return template

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        start = time.perf_counter()
        request_id = sane_request_id(Headers(scope=scope).get(REQUEST_ID_HEADER)) or uuid.uuid4().hex
        token = request_id_var.set(request_id)
        route = self._template(scope)
        state: dict[str, Any] = {"status": 500, "started": False, "problem": None}

        async def send_with_id(message: Message) -> None:
            if message["type"] == "http.response.start":
                state["started"] = True
                state["status"] = message["status"]
                headers = MutableHeaders(scope=message)
                headers[REQUEST_ID_HEADER] = request_id
                if headers.get("content-type", "").startswith(PROBLEM_JSON):
                    state["problem"] = bytearray()
            elif message["type"] == "http.response.body" and state["problem"] is not None:
                if len(state["problem"]) < _PEEK_BYTES:
                    state["problem"] += message.get("body", b"")
            await send(message)

        in_progress = IN_PROGRESS.labels(route=route)
        in_progress.inc()
        try:
            await self.app(scope, receive, send_with_id)
        except Exception:
            error_log.exception("unhandled error", extra={"route": route})
            if not state["started"]:
                response = problem_response(
                    Problem(
                        "internal-error",
                        500,
                        "The service failed to answer; the error is logged with this request's id.",
                    ),
                    scope.get("path", ""),
                )
                await response(scope, receive, send_with_id)
        finally:
            in_progress.dec()
            self._record(scope, route, state, time.perf_counter() - start)
            request_id_var.reset(token)

    @staticmethod
    def _record(scope: Scope, route: str, state: dict[str, Any], seconds: float) -> None:
        method, status = method_label(scope.get("method", "")), str(state["status"])
        REQUESTS.labels(method=method, route=route, status=status).inc()
        REQUEST_SECONDS.labels(method=method, route=route, status=status).observe(seconds)
        if state["problem"]:
            try:
                kind = str(json.loads(bytes(state["problem"])).get("type", "")).rsplit(":", 1)[-1]
            except (ValueError, AttributeError):
                kind = ""
            count_rejection(kind)
        client = scope.get("client")
        access_log.info(
            "%s %s %s",
            method,
            route,
            status,
            extra={
                "method": method,
                "route": route,
                "status": state["status"],
                "duration_ms": round(seconds * 1000, 3),
                "client": client[0] if client else None,
            },
        )


class BodyLimitMiddleware:
    """Refuse a request body larger than ``max_bytes`` with 413, before anything parses it.

    The declared ``Content-Length`` is checked first (nothing is read when it is too big);
    then the body is read as it streams and counted, which also covers chunked bodies and
    bodies longer than declared.  The body, once read within the limit, is handed on whole.
    """

    def __init__(self, app: ASGIApp, *, max_bytes: int) -> None:
        self.app = app
        self.max_bytes = max_bytes

    def _too_large(self, scope: Scope) -> Any:
        return problem_response(
            Problem(
                "payload-too-large", 413, f"The request body exceeds this service's limit of {self.max_bytes:,} bytes."
            ),
            scope.get("path", ""),
        )

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = Headers(scope=scope).get("content-length")
        if declared is not None:
            if not declared.strip().isdigit():
                response = problem_response(
                    problem_of(MalformedBody("The Content-Length header is not a number.")), scope.get("path", "")
                )
                await response(scope, receive, send)
                return
            if int(declared) > self.max_bytes:
                await self._too_large(scope)(scope, receive, send)
                return
        body = bytearray()
        pending: list[Message] = []
        while True:
            message = await receive()
            if message["type"] == "http.disconnect":
                return  # the client left before its body was in: nothing to answer
            if message["type"] != "http.request":
                pending.append(message)
                break
            body += message.get("body", b"")
            if len(body) > self.max_bytes:
                await self._too_large(scope)(scope, receive, send)
                return
            if not message.get("more_body", False):
                break
        first: list[Message] = [{"type": "http.request", "body": bytes(body), "more_body": False}, *pending]

        async def replay() -> Message:
            if first:
                return first.pop(0)
            return await receive()

        await self.app(scope, replay, send)


class ProblemCORSMiddleware(CORSMiddleware):
    """Starlette's CORS middleware, with a refused preflight answered as a 403 problem.

    Starlette answers a preflight it refuses with ``400 text/plain``; here the answer is
    problem details naming what was refused (origin, method, headers), CORS headers kept.
    """

    def preflight_response(self, request_headers: Headers) -> Response:
        response = super().preflight_response(request_headers)
        if response.status_code < 400:
            return response
        refused = bytes(response.body).decode("utf-8", "replace").removeprefix("Disallowed CORS ")
        headers = {k: v for k, v in response.headers.items() if k.lower() not in {"content-length", "content-type"}}
        detail = (
            f"This cross-origin request is not allowed here (refused: {refused}). "
            "The allowed origins are set by MOVECAST_CORS_ORIGINS."
        )
        return problem_response(Problem("forbidden-origin", 403, detail), "", headers=headers)


#: Largest piece of a response body handed to the server at once (:class:`BodyChunkMiddleware`).
BODY_CHUNK_BYTES = 1024 * 1024


class BodyChunkMiddleware:
    """Hand a large response body to the server in pieces of :data:`BODY_CHUNK_BYTES`.

    A body sent in one message that the socket cannot take at once is copied whole into the
    transport's write buffer, so the serving process holds it twice while a client reads it
    (a design answer of 28 MiB raised the process's peak by about three answers,
    ``tests/bench/bench_answer_memory.py``).  In pieces, the server's flow control waits for
    the socket to drain between them and holds at most about one piece beyond the body.  The
    bytes, their order and the headers (``Content-Length`` included) are unchanged; the
    outermost middleware, so every other one sees the body as the app sent it.
    """

    def __init__(self, app: ASGIApp, *, chunk_bytes: int = BODY_CHUNK_BYTES) -> None:
        self.app = app
        self.chunk_bytes = chunk_bytes

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        size = self.chunk_bytes

        async def send_in_pieces(message: Message) -> None:
            body = message.get("body", b"")
            if message["type"] != "http.response.body" or len(body) <= size:
                await send(message)
                return
            more = bool(message.get("more_body", False))
            view = memoryview(body)
            for start in range(0, len(view), size):
                last = start + size >= len(view)
                await send(
                    {
                        "type": "http.response.body",
                        "body": bytes(view[start : start + size]),
                        "more_body": more or not last,
                    }
                )

        await self.app(scope, receive, send_in_pieces)
