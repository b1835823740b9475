"""The exceptions of movecast, in one place.

The whole tree::

    MovecastError                    base of everything movecast raises on purpose
    ├── InvalidRequest               the request breaks a rule the schema alone cannot check
    │                                (sizes that must agree, caps from settings); carries
    │                                one FieldProblem per broken rule
    └── NumericalError               the numbers are well-formed but the problem is not
        └── HessianNotPositiveDefinite
                                     some moves carry no penalty and the outputs cannot see
                                     them, so the optimal move sequence is not unique

The solver raises only ``NumericalError`` and its children; the schema edge raises
``InvalidRequest``.  One handler at the HTTP edge turns each kind into an RFC 9457 problem
details response.  This module imports nothing from movecast, so every layer may use it.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = [
    "FieldProblem",
    "HessianNotPositiveDefinite",
    "InvalidRequest",
    "MovecastError",
    "NumericalError",
]


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

    ``pointer`` names the request field a user should change, where one can be named.
    """

    def __init__(self, detail: str, *, pointer: str = "") -> None:
        self.detail = detail
        self.pointer = pointer
        super().__init__(detail)


class HessianNotPositiveDefinite(NumericalError):
    """The Hessian G'QG + R is singular: some move directions change neither cost term."""
