"""One problem model for every failure, and the one function from an exception to it.

Every answer about a failure — an HTTP error response, a failed batch item, a failed sweep
entry, the command line's message — is a :class:`Problem` (RFC 9457 problem details),
made by :func:`problem_of` from the exception.  Here, and only here, the solver's field keys
become JSON pointers (RFC 6901).

    problem = problem_of(exc, base="/items/3/request", scope="item")
    problem.body(instance="/design/batch")          # the JSON the service answers
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any, Literal

from pydantic import ValidationError

from service.errors import (
    FieldKey,
    FieldProblem,
    HeavyLaneFull,
    InvalidRequest,
    MalformedBody,
    NumericalError,
    TimeLimitExceeded,
)
from service.schemas.model import MODEL_KINDS

__all__ = [
    "PROBLEM_TITLES",
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
    "busy": "Too many large requests waiting",
}

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

    def body(self, instance: str) -> dict[str, Any]:
        """The JSON body of the problem, answered for the request at path ``instance``."""
        return {
            "type": self.type,
            "title": self.title,
            "status": self.status,
            "detail": self.detail,
            "instance": instance,
            "errors": [{"pointer": p.pointer, "detail": p.detail} for p in self.errors],
        }

    def brief(self) -> dict[str, Any]:
        """The short form of a sweep entry: type, detail and the fields."""
        return {
            "type": self.type,
            "detail": self.detail,
            "errors": [{"pointer": p.pointer, "detail": p.detail} for p in self.errors],
        }

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


def _sentence(error: Mapping[str, Any]) -> str:
    kind = error.get("type", "")
    if kind == "extra_forbidden":
        return "unknown field; check its spelling against the schema"
    if kind == "missing":
        return "this field is required"
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
    if isinstance(exc, HeavyLaneFull):
        detail = (
            f"The service's lane for large computations is full ({exc.waiting} large requests are "
            "already waiting). Retry later, or make the request smaller."
        )
        return Problem("busy", 503, detail, headers={"Retry-After": "5"})
    if isinstance(exc, TimeLimitExceeded):
        if scope == "item":
            detail = f"The batch's compute time limit of {exc.seconds:g} s ran out before this item was designed."
            return Problem("time-limit", 503, detail)
        where = "waiting for a free solver" if exc.queued else "solving"
        detail = f"The compute time limit of {exc.seconds:g} s ran out while {where}. " + (
            "Retry later." if exc.queued else "Shorten the horizons or reduce the model."
        )
        return Problem("time-limit", 503, detail, headers={"Retry-After": "1"} if exc.queued else None)
    if scope == "item":
        return Problem("internal-error", 500, "The service failed to design this item; the error is logged.")
    return Problem("internal-error", 500, "The service failed to answer; the error is logged.")
