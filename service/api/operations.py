"""What makes the app fit to run as infrastructure, installed in one call by the factory.

:func:`install_operations` adds, around the routers already included:

- the middleware stack, outermost first: body pieces (large response bodies handed on in
  1 MiB pieces), request context (request id, access log, request metrics, last-resort 500), CORS (only with ``MOVECAST_CORS_ORIGINS``), API key (only with
  keys), body limit (``MOVECAST_MAX_BODY_BYTES``), answer memory (each request's hold on the
  bytes of answers in flight, ``service.api.answer_memory``);
- GET /metrics;
- the shared error responses (401, 413, 503, 500) in the OpenAPI document of every route
  they can come from, and the schema of the problem body (``ProblemReport``) on every
  ``application/problem+json`` answer it documents;
- at start-up: a warning when no API key is configured, one for each ``MOVECAST_*`` variable
  that is no setting (a misspelt name would otherwise be ignored in silence), glibc's threshold for mapping large
  blocks fixed (``service.api.serving.return_large_blocks``), the solver processes started, and
  a SIGTERM hook that turns /readyz to 503 at the *start* of shutdown (the server goes on
  answering in-flight requests; readiness must not wait for them).
"""

from __future__ import annotations

import copy
import logging
import os
import signal
import threading
from collections.abc import AsyncIterator, Callable
from contextlib import asynccontextmanager
from types import FrameType
from typing import Any

from fastapi import FastAPI

from service.api import metrics
from service.api.answer_memory import AnswerMemory, AnswerMemoryMiddleware
from service.api.compute import solver_lanes
from service.api.middleware import (
    REQUEST_ID_HEADER,
    BodyChunkMiddleware,
    BodyLimitMiddleware,
    ProblemCORSMiddleware,
    RequestContextMiddleware,
)
from service.api.problems import PROBLEM_JSON
from service.api.security import OPEN_PATHS, ApiKeyMiddleware, KeyRing
from service.api.serving import return_large_blocks, stop_with_the_supervisor
from service.api.settings import Settings
from service.api.settings_checks import unknown_variables
from service.schemas.batch import ProblemReport

__all__ = ["COMMON_RESPONSES", "install_operations"]

log = logging.getLogger("movecast.operations")

COMMON_RESPONSES: dict[int | str, dict[str, Any]] = {
    401: {"description": "An API key is required and was missing or not accepted.", "content": {PROBLEM_JSON: {}}},
    413: {"description": "The request body exceeds the size limit.", "content": {PROBLEM_JSON: {}}},
    500: {"description": "The service failed; the error is logged with the request id.", "content": {PROBLEM_JSON: {}}},
    503: {
        "description": "The compute time limit ran out (waiting for a solver or solving), or the solver "
        "process stopped; `Retry-After` says when to try again.",
        "content": {PROBLEM_JSON: {}},
    },
}


UNSUPPORTED_MEDIA_TYPE: dict[str, Any] = {
    "description": "The body is not sent as JSON (`Content-Type: application/json`), or is sent compressed "
    "(any `Content-Encoding` but `identity`); `Accept-Post` or `Accept-Encoding` says what is taken.",
    "content": {PROBLEM_JSON: {}},
}


#: Where the problem body's schema sits in the OpenAPI document.
PROBLEM_SCHEMA_REF = "#/components/schemas/ProblemReport"


def _schema_problem_answers(schema: dict[str, Any]) -> None:
    """Give every ``application/problem+json`` answer of the document the problem body's schema.

    The problem models (:class:`~service.schemas.batch.ProblemReport` and the field entries it
    lists) are added to the components when no route has put them there already.
    """
    components = schema.setdefault("components", {}).setdefault("schemas", {})
    problem = ProblemReport.model_json_schema(mode="serialization", ref_template="#/components/schemas/{model}")
    for name, definition in problem.pop("$defs", {}).items():
        components.setdefault(name, definition)
    components.setdefault("ProblemReport", problem)
    for operations in schema.get("paths", {}).values():
        for operation in operations.values():
            for response in operation.get("responses", {}).values():
                media = response.get("content", {}).get(PROBLEM_JSON)
                if media is not None and "schema" not in media:
                    media["schema"] = {"$ref": PROBLEM_SCHEMA_REF}


def _document_common_responses(app: FastAPI) -> None:
    """Add the shared error responses to every operation outside the open paths.

    Done on the generated document (not on the routes), so routes included later and any
    router layout of FastAPI are covered alike.
    """
    generate = app.openapi

    def openapi() -> dict[str, Any]:
        if app.openapi_schema is None:
            schema = generate()
            for path, operations in schema.get("paths", {}).items():
                if path in OPEN_PATHS:
                    continue
                for operation in operations.values():
                    for status, response in COMMON_RESPONSES.items():
                        operation.setdefault("responses", {}).setdefault(str(status), copy.deepcopy(response))
                    if "requestBody" in operation:
                        operation["responses"].setdefault("415", copy.deepcopy(UNSUPPORTED_MEDIA_TYPE))
            _schema_problem_answers(schema)
        assert app.openapi_schema is not None
        return app.openapi_schema

    app.openapi = openapi  # type: ignore[method-assign]


def _sigterm_hook(app: FastAPI) -> Callable[[], None]:
    """Chain a SIGTERM handler that marks the app not ready; return a function undoing it.

    Only the main thread may set signal handlers: under a test client (lifespan in another
    thread) nothing is installed.
    """
    if threading.current_thread() is not threading.main_thread():
        return lambda: None
    previous = signal.getsignal(signal.SIGTERM)

    def on_sigterm(signum: int, frame: FrameType | None) -> None:
        app.state.ready = False
        log.info("SIGTERM received: not ready; finishing in-flight requests")
        if callable(previous):
            previous(signum, frame)

    signal.signal(signal.SIGTERM, on_sigterm)

    def undo() -> None:
        if signal.getsignal(signal.SIGTERM) is on_sigterm:
            signal.signal(signal.SIGTERM, previous)

    return undo


def _variable_names() -> list[str]:
    """Every ``MOVECAST_*`` variable the settings read."""
    prefix = str(Settings.model_config.get("env_prefix", ""))
    return [prefix + name.upper() for name in Settings.model_fields]


def _wrap_lifespan(app: FastAPI, settings: Settings) -> None:
    inner = app.router.lifespan_context

    @asynccontextmanager
    async def lifespan(app_: FastAPI) -> AsyncIterator[Any]:
        if not settings.api_key_values():
            log.warning(
                "no API key configured (MOVECAST_API_KEYS, MOVECAST_API_KEYS_FILE): "
                "every endpoint is open to anyone who can reach this port"
            )
        for sentence in unknown_variables(os.environ, _variable_names()):
            log.warning(sentence)
        return_large_blocks()  # this serving process only (the solvers keep glibc's default)
        stop_with_the_supervisor()  # a worker of several stops when its supervisor dies
        solver_lanes(settings).start()
        async with inner(app_) as state:
            undo = _sigterm_hook(app_)
            try:
                yield state
            finally:
                undo()

    app.router.lifespan_context = lifespan


def install_operations(app: FastAPI, settings: Settings) -> None:
    """Install middleware, /metrics, handlers, shared responses and start-up hooks."""
    app.include_router(metrics.router)
    _document_common_responses(app)
    _wrap_lifespan(app, settings)
    # add_middleware puts each new one outside the previous: add innermost first.
    app.state.answer_memory = AnswerMemory(settings.max_answer_memory_bytes)
    app.add_middleware(AnswerMemoryMiddleware, memory=app.state.answer_memory)
    app.add_middleware(BodyLimitMiddleware, max_bytes=settings.max_body_bytes)
    keys = KeyRing(settings.api_key_values())
    if keys:
        app.add_middleware(ApiKeyMiddleware, keys=keys)
    if settings.cors_origins:
        app.add_middleware(
            ProblemCORSMiddleware,
            allow_origins=list(settings.cors_origins),
            allow_methods=["GET", "POST"],
            allow_headers=["Authorization", "Content-Type", REQUEST_ID_HEADER],
            expose_headers=[REQUEST_ID_HEADER],
            max_age=600,
        )
    app.add_middleware(RequestContextMiddleware)
    app.add_middleware(BodyChunkMiddleware)
