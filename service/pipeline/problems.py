"""One problem model for every failure, and the one function from an exception to it.

Every answer about a failure — an HTTP error response, a failed batch item, a failed sweep
entry, the command line's message — is a :class:`Problem` (RFC 9457 problem details),
made by :func:`problem_of` from the exception.  Here, and only here, the solver's field keys
become JSON pointers (RFC 6901).

    problem = problem_of(exc, base="/items/3/request", scope="item")
    problem.body(instance="/design/batch")          # the JSON the service answers
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any, Literal

from pydantic import ValidationError

from service.errors import (
    AnswerMemoryFull,
    Cancelled,
    ComputeDied,
    ComputeOutOfMemory,
    FieldKey,
    FieldProblem,
    HeavyLaneFull,
    InvalidRequest,
    MalformedBody,
    NumericalError,
    TimeLimitExceeded,
    UnsupportedMediaType,
)
from service.schemas.model import MODEL_KINDS

__all__ = [
    "CLIENT_CLOSED",
    "MAX_REPORTED_ERRORS",
    "PROBLEM_TITLES",
    "RETRY_AFTER_SECONDS",
    "Problem",
    "Scope",
    "pointer",
    "problem_of",
    "validation_problems",
]

#: The title of each kind of problem (its type is ``urn:movecast:problem:<kind>``).
PROBLEM_TITLES = {
    "invalid-request": "Invalid request",
    "malformed-body": "Malformed request body",
    "numerical-problem": "The design problem cannot be solved",
    "http-error": "HTTP error",
    "internal-error": "Internal error",
    "unauthorized": "Authentication required",
    "payload-too-large": "Request body too large",
    "time-limit": "Compute time limit exceeded",
    "unsupported-media-type": "Unsupported media type",
    "not-acceptable": "Not acceptable",
    "request-timeout": "Request not received in time",
    "too-many-connections": "Too many connections",
    "solver-failed": "The solver process failed",
    "out-of-memory": "Not enough memory for this request",
    "forbidden-origin": "Origin not allowed",
    "client-closed": "Client closed the request",
    "busy": "Too many large requests waiting",
}

#: Most ``errors`` entries of one problem; the rest are counted in ``omitted_errors``, so a
#: body with a hundred thousand bad entries cannot make a huge answer.
MAX_REPORTED_ERRORS = 50
#: Seconds a client is told to wait before retrying a request the service could not take now.
RETRY_AFTER_SECONDS = 1
#: Status of an answer to a client that has gone away (nobody reads it; logs and metrics do),
#: "client closed request" as common practice names it.
CLIENT_CLOSED = 499

#: What a problem is about: a whole request, or one item of a batch (sweep entries are
#: answered like requests, with their own detail).
Scope = Literal["request", "item"]


def pointer(*parts: str | int) -> str:
    """Return the JSON pointer (RFC 6901) of a field key, escaping ``~`` and ``/``."""
    return "".join("/" + str(p).replace("~", "~0").replace("/", "~1") for p in parts)


@dataclass(frozen=True)
class Problem:
    """An RFC 9457 problem: its kind, HTTP status, sentence and the fields it names."""

    kind: str
    status: int
    detail: str
    errors: tuple[FieldProblem, ...] = ()
    headers: Mapping[str, str] | None = field(default=None, compare=False)

    @property
    def type(self) -> str:
        """The problem type URI."""
        return f"urn:movecast:problem:{self.kind}"

    @property
    def title(self) -> str:
        """The problem type's short title."""
        return PROBLEM_TITLES[self.kind]

    def _errors(self, body: dict[str, Any]) -> dict[str, Any]:
        """Add at most :data:`MAX_REPORTED_ERRORS` entries to ``body`` and count the rest.

        ``omitted_errors`` (an RFC 9457 extension member) appears only when some were left out.
        """
        body["errors"] = [{"pointer": p.pointer, "detail": p.detail} for p in self.errors[:MAX_REPORTED_ERRORS]]
        if len(self.errors) > MAX_REPORTED_ERRORS:
            body["omitted_errors"] = len(self.errors) - MAX_REPORTED_ERRORS
        return body

    def body(self, instance: str) -> dict[str, Any]:
        """The JSON body of the problem, answered for the request at path ``instance``."""
        return self._errors(
            {"type": self.type, "title": self.title, "status": self.status, "detail": self.detail, "instance": instance}
        )

    def brief(self) -> dict[str, Any]:
        """The short form of a sweep entry: type, detail and the fields."""
        return self._errors({"type": self.type, "detail": self.detail})

    def with_detail(self, detail: str) -> Problem:
        """The same problem told by another sentence."""
        return replace(self, detail=detail)


def _location(error: Mapping[str, Any]) -> tuple[str | int, ...]:
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
        name = str((error.get("ctx") or {}).get("discriminator", "kind")).strip("'\"")
        kept = (*kept, name)
    return kept


def _is_model_kind(error: Mapping[str, Any]) -> bool:
    """Whether a union-tag error is about a plant model's ``kind`` (the requests' only tagged union)."""
    return str((error.get("ctx") or {}).get("discriminator", "")).strip("'\"") == "kind"


def _sentence(error: Mapping[str, Any]) -> str:
    kind = error.get("type", "")
    if kind == "extra_forbidden":
        return "unknown field; check its spelling against the schema"
    if kind == "missing":
        return "this field is required"
    if kind in {"union_tag_not_found", "union_tag_invalid"} and _is_model_kind(error):
        forms = ", ".join(f"'{k}'" for k in sorted(MODEL_KINDS))
        if kind == "union_tag_not_found":
            return f"this field is required: it names the form of the model, one of {forms}"
        tag = (error.get("ctx") or {}).get("tag", "")
        return f"'{tag}' is not a form of model; use one of {forms}"
    if kind in {"model_type", "model_attributes_type", "dict_type"}:
        # pydantic's sentence names the Python class ("instance of Horizons"), not the field's type
        return "input should be a JSON object (a set of named fields)"
    message = str(error.get("msg", "invalid value"))
    return message[0].lower() + message[1:] if message else "invalid value"


def validation_problems(errors: Sequence[Mapping[str, Any]]) -> list[FieldProblem]:
    """Turn pydantic errors into FieldProblems, one per distinct pointer and sentence."""
    seen: dict[tuple[str, str], FieldProblem] = {}
    for error in errors:
        item = FieldProblem(pointer(*_location(error)), _sentence(error))
        seen.setdefault((item.pointer, item.detail), item)
    return list(seen.values())


def _prefixed(base: str, problems: Iterable[FieldProblem]) -> tuple[FieldProblem, ...]:
    return tuple(FieldProblem(base + p.pointer, p.detail) for p in problems)


def _field_problems(base: str, key: FieldKey, detail: str) -> tuple[FieldProblem, ...]:
    return (FieldProblem(base + pointer(*key), detail),) if key else ()


def problem_of(exc: BaseException, *, base: str = "", scope: Scope = "request") -> Problem:
    """The problem that answers ``exc``.

    Parameters
    ----------
    exc : BaseException
        A movecast exception (:mod:`service.errors`), a pydantic ``ValidationError``, or
        anything else (an unexpected failure, ``ComputeCrashed`` included: ``internal-error``,
        nothing of it disclosed; the caller logs it).
    base : str, keyword-only
        JSON pointer put before every field's pointer (``/items/3/request`` for a batch item).
    scope : {"request", "item"}, keyword-only
        What the sentence speaks of: the request, or one item of a batch.
    """
    noun = "item" if scope == "item" else "request"
    if isinstance(exc, ValidationError):
        exc = InvalidRequest(validation_problems(exc.errors()))
    if isinstance(exc, InvalidRequest):
        problems = _prefixed(base, exc.problems)
        return Problem("invalid-request", 422, f"The {noun} has {len(problems)} invalid field(s).", problems)
    if isinstance(exc, NumericalError):
        return Problem("numerical-problem", 422, exc.detail, _field_problems(base, exc.field, exc.detail))
    if isinstance(exc, MalformedBody):
        return Problem("malformed-body", 400, exc.detail)
    if isinstance(exc, UnsupportedMediaType):
        # RFC 9110, 15.5.16: Accept-Encoding names the content codings a request may use
        headers = {"Accept-Encoding": "identity"} if exc.encoding else {"Accept-Post": exc.accepted}
        return Problem("unsupported-media-type", 415, exc.detail, headers=headers)
    if isinstance(exc, HeavyLaneFull):
        detail = (
            f"The service's lane for large computations is full ({exc.waiting} large requests are "
            "already waiting). Retry later, or make the request smaller."
        )
        return Problem("busy", 503, detail, headers={"Retry-After": "5"})
    if isinstance(exc, AnswerMemoryFull):
        detail = (
            f"The compute time limit of {exc.seconds:g} s ran out while this request waited for room beside the "
            f"large answers the service is sending ({exc.held / 2**20:,.0f} of {exc.limit / 2**20:,.0f} MiB held). "
            "Retry after the time given in Retry-After, or ask for a smaller answer."
        )
        return Problem("busy", 503, detail, headers={"Retry-After": str(RETRY_AFTER_SECONDS)})
    if isinstance(exc, TimeLimitExceeded):
        if scope == "item":
            detail = f"The batch's compute time limit of {exc.seconds:g} s ran out before this item was designed."
            return Problem("time-limit", 503, detail)
        if exc.queued:
            detail = (
                f"The compute time limit of {exc.seconds:g} s ran out while waiting for a free solver: "
                "the service is busy. Retry after the time given in Retry-After."
            )
            retry = RETRY_AFTER_SECONDS
        else:
            detail = (
                f"The compute time limit of {exc.seconds:g} s ran out while solving. A retry helps only if "
                "the service was busy; otherwise shorten the horizons or reduce the model."
            )
            retry = max(1, math.ceil(exc.seconds))
        return Problem("time-limit", 503, detail, headers={"Retry-After": str(retry)})
    if isinstance(exc, ComputeOutOfMemory):
        if scope == "item":
            detail = "The solver ran out of memory designing this item; shorten its horizons or reduce its model."
        else:
            detail = (
                "The solver ran out of memory for this request. Shorten the prediction or control horizon, "
                "simulate fewer steps or reduce the model."
            )
        return Problem("out-of-memory", 422, detail)
    if isinstance(exc, ComputeDied):
        if scope == "item":
            return Problem("solver-failed", 503, "The solver process stopped while designing this item; retry it.")
        detail = "The solver process stopped while answering this request (it has been replaced). Retry it."
        return Problem("solver-failed", 503, detail, headers={"Retry-After": str(RETRY_AFTER_SECONDS)})
    if isinstance(exc, Cancelled):
        return Problem("client-closed", CLIENT_CLOSED, "The client closed the connection before the answer.")
    if scope == "item":
        return Problem("internal-error", 500, "The service failed to design this item; the error is logged.")
    return Problem("internal-error", 500, "The service failed to answer; the error is logged.")
