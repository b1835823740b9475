"""The exceptions of movecast, in one place.

The whole tree::

    MovecastError                    base of everything movecast raises on purpose
    ├── InvalidRequest               the request breaks a rule the schema alone cannot check
    │                                (sizes that must agree, caps from settings); carries
    │                                one FieldProblem per broken rule
    ├── NumericalError               the numbers are well-formed but the problem is not;
    │   │                            carries the field key of the input a user should change
    │   └── HessianNotPositiveDefinite
    │                                some moves carry no penalty and the outputs cannot see
    │                                them, so the optimal move sequence is not unique
    ├── MalformedBody                the request body cannot be read or is not JSON
    ├── UnsupportedMediaType         the request body is not sent as JSON
    ├── HeavyLaneFull                the lane for large computations has as many requests
    │                                waiting as it accepts; retry later
    ├── TimeLimitExceeded            the request's compute time ran out, waiting for a
    │                                compute process or in one
    ├── ComputeOutOfMemory           the call ran out of memory in its compute process
    ├── Cancelled                    the client went away; its call was stopped
    └── ComputeCrashed               a compute process failed unexpectedly; the details go
        │                            to the log only
        └── ComputeDied              the compute process itself died during the call (it
                                     has been replaced); a retry may succeed

The solver raises only ``NumericalError`` and its children, naming the input by a *field
key*: the path of keys of that input in the request (``("weights", "move")``), never a JSON
pointer.  The pipeline raises ``InvalidRequest``, the edges ``MalformedBody`` and
``UnsupportedMediaType``; the compute pool raises the rest.
:func:`service.pipeline.problems.problem_of` turns any of them into the one problem model
that the HTTP handlers, batch items, sweep entries and the command line all answer (and
there field keys become JSON pointers).  This module imports nothing from movecast, so
every layer may use it.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = [
    "Cancelled",
    "ComputeCrashed",
    "ComputeDied",
    "ComputeOutOfMemory",
    "FieldKey",
    "FieldProblem",
    "HeavyLaneFull",
    "HessianNotPositiveDefinite",
    "InvalidRequest",
    "MalformedBody",
    "MovecastError",
    "NumericalError",
    "TimeLimitExceeded",
    "UnsupportedMediaType",
]

FieldKey = tuple[str | int, ...]
"""The path of keys of one input in the request, e.g. ``("model", "elements", 0, 1)``."""


@dataclass(frozen=True)
class FieldProblem:
    """One thing wrong with one field: a JSON pointer (RFC 6901) and a plain sentence."""

    pointer: str
    detail: str


class MovecastError(Exception):
    """Base class of every exception movecast raises on purpose."""


class InvalidRequest(MovecastError):
    """The request is well-formed JSON of the right shape but breaks a rule of the contract."""

    def __init__(self, problems: list[FieldProblem]) -> None:
        if not problems:
            raise ValueError("InvalidRequest needs at least one FieldProblem")
        self.problems = list(problems)
        super().__init__("; ".join(f"{p.pointer}: {p.detail}" for p in self.problems))


class NumericalError(MovecastError):
    """The numbers are valid but describe a problem the controller design cannot solve.

    ``field`` is the key of the input a user should change (empty when none can be named).
    """

    def __init__(self, detail: str, *, field: FieldKey = ()) -> None:
        self.detail = detail
        self.field: FieldKey = tuple(field)
        super().__init__(detail)


class HessianNotPositiveDefinite(NumericalError):
    """The Hessian G'QG + R is singular: some move directions change neither cost term."""


class MalformedBody(MovecastError):
    """The request body cannot be read or is not valid JSON."""

    def __init__(self, detail: str) -> None:
        self.detail = detail
        super().__init__(detail)


class UnsupportedMediaType(MovecastError):
    """The request body is sent with a content type other than JSON; ``accepted`` says which.

    ``encoding``: the body was sent compressed (a ``Content-Encoding`` other than identity),
    which this service does not read (RFC 9110, section 15.5.16).
    """

    def __init__(self, detail: str, *, accepted: str = "application/json", encoding: bool = False) -> None:
        self.detail = detail
        self.accepted = accepted
        self.encoding = encoding
        super().__init__(detail)


class HeavyLaneFull(MovecastError):
    """The heavy lane has as many requests waiting as it accepts; retry later."""

    def __init__(self, waiting: int) -> None:
        self.waiting = waiting
        super().__init__(f"{waiting} heavy requests are already waiting")


class AnswerMemoryFull(MovecastError):
    """The time limit passed while the request waited for room beside the answers in flight."""

    def __init__(self, seconds: float, held: int, limit: int) -> None:
        self.seconds = seconds
        self.held = held
        self.limit = limit
        super().__init__(
            f"time limit of {seconds:g} s exceeded waiting for answer memory ({held} of {limit} bytes held)"
        )


class TimeLimitExceeded(MovecastError):
    """The request's compute time limit passed, waiting for a compute process (``queued``) or in one."""

    def __init__(self, seconds: float, *, queued: bool) -> None:
        self.seconds = seconds
        self.queued = queued
        super().__init__(f"time limit of {seconds:g} s exceeded")


class ComputeCrashed(MovecastError):
    """A compute process died or failed in an unexpected way (it has been replaced)."""


class ComputeDied(ComputeCrashed):
    """The compute process died while running the call (killed, out of memory); replaced."""


class ComputeOutOfMemory(MovecastError):
    """The call ran out of memory in its compute process (``MemoryError``)."""


class Cancelled(MovecastError):
    """The request's client went away; its call was stopped and its compute process replaced."""
