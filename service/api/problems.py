"""RFC 9457 problem details: every error response of movecast.

Each problem carries ``type``, ``title``, ``status``, ``detail``, ``instance`` and an
``errors`` list of ``{"pointer", "detail"}`` entries naming fields by JSON pointer.
"""

from __future__ import annotations

import logging
from collections.abc import Iterable, Sequence
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException

from service.errors import FieldProblem, InvalidRequest, NumericalError
from service.schemas.common import pointer
from service.schemas.model import MODEL_KINDS

__all__ = ["PROBLEM_JSON", "install_problem_handlers", "problem_body", "problem_response", "validation_problems"]

PROBLEM_JSON = "application/problem+json"
log = logging.getLogger("movecast.problems")

_TYPES = {
    "invalid-request": "Invalid request",
    "malformed-body": "Malformed request body",
    "numerical-problem": "The design problem cannot be solved",
    "http-error": "HTTP error",
    "internal-error": "Internal error",
    "unauthorized": "Authentication required",
    "payload-too-large": "Request body too large",
    "time-limit": "Compute time limit exceeded",
    "busy": "Too many large requests waiting",
}


def problem_body(
    kind: str, status: int, detail: str, instance: str, problems: Iterable[FieldProblem] = ()
) -> dict[str, Any]:
    """The JSON body of one problem."""
    return {
        "type": f"urn:movecast:problem:{kind}",
        "title": _TYPES[kind],
        "status": status,
        "detail": detail,
        "instance": instance,
        "errors": [{"pointer": p.pointer, "detail": p.detail} for p in problems],
    }


def problem_response(
    kind: str,
    status: int,
    detail: str,
    instance: str,
    problems: Iterable[FieldProblem] = (),
    headers: dict[str, str] | None = None,
) -> JSONResponse:
    """A problem-details response."""
    return JSONResponse(
        problem_body(kind, status, detail, instance, problems),
        status_code=status,
        media_type=PROBLEM_JSON,
        headers=headers,
    )


def _location(error: dict[str, Any]) -> tuple[str | int, ...]:
    """The error's field: FastAPI's ``body`` prefix and pydantic's union tags dropped.

    A discriminated union puts the tag it chose (``state_space``) into the location; a tag
    that matches no member is reported on the discriminator field itself (``/model/kind``).
    """
    parts = list(error.get("loc", ()))
    if parts and parts[0] == "body":
        parts = parts[1:]
    kept = tuple(
        p for p in parts if not (isinstance(p, str) and ("[" in p or p == "function-after" or p in MODEL_KINDS))
    )
    if error.get("type") in {"union_tag_invalid", "union_tag_not_found"}:
        field = str((error.get("ctx") or {}).get("discriminator", "kind")).strip("'\"")
        kept = (*kept, field)
    return kept


def _sentence(error: dict[str, Any]) -> str:
    kind = error.get("type", "")
    if kind == "extra_forbidden":
        return "unknown field; check its spelling against the schema"
    if kind == "missing":
        return "this field is required"
    message = str(error.get("msg", "invalid value"))
    return message[0].lower() + message[1:] if message else "invalid value"


def validation_problems(errors: Sequence[dict[str, Any]]) -> list[FieldProblem]:
    """Turn pydantic errors into FieldProblems, one per distinct pointer and sentence."""
    seen: dict[tuple[str, str], FieldProblem] = {}
    for error in errors:
        item = FieldProblem(pointer(*_location(error)), _sentence(error))
        seen.setdefault((item.pointer, item.detail), item)
    return list(seen.values())


def install_problem_handlers(app: FastAPI) -> None:
    """Register one handler per kind of failure; none leaks a trace or a path."""

    @app.exception_handler(RequestValidationError)
    async def _invalid(request: Request, exc: RequestValidationError) -> JSONResponse:
        errors = list(exc.errors())
        if any(e.get("type") == "json_invalid" for e in errors):
            return problem_response("malformed-body", 400, "The request body is not valid JSON.", request.url.path)
        problems = validation_problems(errors)
        return problem_response(
            "invalid-request",
            422,
            f"The request has {len(problems)} invalid field(s).",
            request.url.path,
            problems,
        )

    @app.exception_handler(InvalidRequest)
    async def _semantic(request: Request, exc: InvalidRequest) -> JSONResponse:
        return problem_response(
            "invalid-request",
            422,
            f"The request has {len(exc.problems)} invalid field(s).",
            request.url.path,
            exc.problems,
        )

    @app.exception_handler(NumericalError)
    async def _numerical(request: Request, exc: NumericalError) -> JSONResponse:
        problems = [FieldProblem(exc.pointer, exc.detail)] if exc.pointer else []
        return problem_response("numerical-problem", 422, exc.detail, request.url.path, problems)

    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException) -> JSONResponse:
        return problem_response("http-error", exc.status_code, str(exc.detail), request.url.path, headers=exc.headers)

    @app.exception_handler(Exception)
    async def _internal(request: Request, exc: Exception) -> JSONResponse:
        log.exception("unhandled error on %s", request.url.path)
        return problem_response(
            "internal-error", 500, "The service failed to answer; the error is logged.", request.url.path
        )
