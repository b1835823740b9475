"""RFC 9457 problem details at the HTTP edge: every error response of movecast.

Each problem carries ``type``, ``title``, ``status``, ``detail``, ``instance`` and an
``errors`` list of ``{"pointer", "detail"}`` entries naming fields by JSON pointer.  The
problem itself comes from :func:`service.pipeline.problems.problem_of`, the one function
from an exception to a problem; this module only answers it.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException

from service.errors import (
    Cancelled,
    ComputeCrashed,
    ComputeDied,
    ComputeOutOfMemory,
    InvalidRequest,
    MalformedBody,
    MovecastError,
)
from service.pipeline.problems import Problem, problem_of, validation_problems

__all__ = ["PROBLEM_JSON", "install_problem_handlers", "problem_response"]

PROBLEM_JSON = "application/problem+json"
log = logging.getLogger("movecast.problems")


def problem_response(problem: Problem, instance: str, headers: Mapping[str, str] | None = None) -> JSONResponse:
    """The problem-details response of ``problem`` for the request at path ``instance``."""
    merged = {**(problem.headers or {}), **(headers or {})}
    return JSONResponse(
        problem.body(instance), status_code=problem.status, media_type=PROBLEM_JSON, headers=merged or None
    )


def install_problem_handlers(app: FastAPI) -> None:
    """Register one handler per kind of failure; none leaks a trace or a path."""

    @app.exception_handler(RequestValidationError)
    async def _invalid(request: Request, exc: RequestValidationError) -> JSONResponse:
        errors = list(exc.errors())
        if any(e.get("type") == "json_invalid" for e in errors):
            failure: MovecastError = MalformedBody("The request body is not valid JSON.")
        else:
            failure = InvalidRequest(validation_problems(errors))
        return problem_response(problem_of(failure), request.url.path)

    @app.exception_handler(MovecastError)
    async def _movecast(request: Request, exc: MovecastError) -> JSONResponse:
        if isinstance(exc, ComputeDied):
            log.error("compute process died: %s", exc)
        elif isinstance(exc, ComputeCrashed):
            log.error("compute process failure: %s", exc)
        elif isinstance(exc, ComputeOutOfMemory):
            log.warning("compute process out of memory on %s", request.url.path)
        elif isinstance(exc, Cancelled):
            log.info("client went away; its computation was stopped")
        return problem_response(problem_of(exc), request.url.path)

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException) -> JSONResponse:
        problem = Problem("http-error", exc.status_code, str(exc.detail))
        return problem_response(problem, request.url.path, headers=exc.headers)

    @app.exception_handler(Exception)
    async def _internal(request: Request, exc: Exception) -> JSONResponse:
        log.exception("unhandled error on %s", request.url.path)
        return problem_response(problem_of(exc), request.url.path)
