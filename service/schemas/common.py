"""Building blocks shared by every request and response model.

Numbers are strict finite floats (integers accepted, booleans and strings refused, NaN and
infinity refused); matrices travel as lists of rows.  Every request model forbids unknown
fields, so a misspelt field is an error, never a silent default, and validates strictly:
a boolean is ``true`` or ``false`` (never ``0``, ``1`` or ``"yes"``), an integer is a JSON
integer (never ``"10"``).  Vectors and matrices stop at their first bad entry (``fail_fast``),
so a list of a hundred thousand bad entries costs one error, not a hundred thousand.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Annotated, Any

import numpy as np
from numpy.typing import NDArray
from pydantic import BaseModel, ConfigDict, Field

from service.errors import FieldProblem

__all__ = [
    "Caps",
    "FiniteFloat",
    "Matrix",
    "MatrixOut",
    "RequestModel",
    "ResponseModel",
    "Vector",
    "check_matrix",
    "check_weight",
    "pointer",
]

FiniteFloat = Annotated[float, Field(strict=True, allow_inf_nan=False)]
"""A finite real number; JSON integers are accepted, booleans and strings are not."""

Vector = Annotated[list[FiniteFloat], Field(min_length=1, fail_fast=True)]
"""A non-empty list of numbers of a request (the schema says ``minItems: 1``)."""
Matrix = Annotated[
    list[Annotated[list[FiniteFloat], Field(min_length=1, fail_fast=True)]], Field(min_length=1, fail_fast=True)
]
"""A non-empty list of non-empty rows of a request."""
MatrixOut = list[list[float]]
"""A matrix of a response (may be empty, e.g. no measured disturbances)."""


class RequestModel(BaseModel):
    """Base of request models: unknown fields are rejected, types are strict."""

    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)


class ResponseModel(BaseModel):
    """Base of response models."""

    model_config = ConfigDict(extra="forbid")


@dataclass(frozen=True)
class Caps:
    """Size caps a request must respect, so that no request can exhaust memory or time.

    Built by the API from its settings; the defaults are the service's defaults.
    """

    max_states: int = 500
    max_signals: int = 100
    max_prediction_horizon: int = 2000
    max_hessian_size: int = 4000
    #: Entries of the stacked prediction matrices ``[Fx Fu G]`` (8 bytes each).
    max_prediction_entries: int = 25_000_000
    #: Peak bytes of one design in the solver process
    #: (``service.pipeline.estimates.design_memory_bytes``).  The default leaves room, inside
    #: the 1 GiB memory limit of ``deploy/``, for the serving process, the fork server and the
    #: solver process's own interpreter and libraries (about 475 MB together, measured).
    max_design_memory_bytes: int = 384 * 1024 * 1024
    #: Entries of the horizon gain ``Kh`` returned in a response.
    max_response_entries: int = 2_000_000
    #: Values in one tuning sweep.
    max_sweep_values: int = 50
    #: Longest simulated run of POST /simulate, in steps.
    max_simulation_steps: int = 100_000
    #: Estimated work of one simulated run: steps times the floating-point operations of a
    #: step (its matrix-vector products) plus a fixed 30 000 per step for the interpreter's
    #: own cost (``service.pipeline.simulate_checks.simulation_work``).  The default is
    #: about 5 s of one core at 1 GFLOP/s, a rough rate for matrix-vector products this small.
    max_simulation_work: int = 5_000_000_000
    #: Estimated work of one frequency analysis (``analysis.frequency`` of /design): grid
    #: points times the floating-point operations of evaluating the loop there
    #: (``service.pipeline.robustness.frequency_work``); the same rough 5 s.
    max_frequency_work: int = 5_000_000_000
    #: Most samples per column of one POST /identify (after resampling).
    max_identify_samples: int = 100_000
    #: Estimated work of one POST /identify: samples times fitted parameters times
    #: ``service.pipeline.identify.WORK_PER_PARAMETER`` (simulated samples per parameter over the
    #: starts, iterations and Jacobians); the default is some 10 s of one core.
    max_identify_work: int = 2_000_000_000


def pointer(*parts: str | int) -> str:
    """Return the JSON pointer (RFC 6901) of a field, escaping ``~`` and ``/``."""
    return "".join("/" + str(p).replace("~", "~0").replace("/", "~1") for p in parts)


def check_matrix(
    value: Sequence[Sequence[float]],
    where: tuple[str | int, ...],
    *,
    rows: int | None = None,
    cols: int | None = None,
    square: bool = False,
    what: str = "matrix",
) -> tuple[NDArray[np.float64] | None, list[FieldProblem]]:
    """Check a list of rows is a non-empty rectangular matrix of the expected size.

    Parameters
    ----------
    value : list of lists of float
    where : tuple
        Pointer parts of the field, e.g. ``("model", "a")``.
    rows, cols : int, optional
        Expected size; ``None`` accepts any.
    square : bool
        The matrix should be square: a row whose length differs from the row count is the
        one reported when rows disagree.
    what : str
        How to call the matrix in messages.

    Returns
    -------
    array or None, list of FieldProblem
        The array when no problem was found.
    """
    problems: list[FieldProblem] = []
    if len(value) == 0:
        return None, [FieldProblem(pointer(*where), f"{what} must have at least one row")]
    lengths = [len(row) for row in value]
    if cols is not None and cols in lengths:
        width = cols
    elif square and len(value) in lengths:
        width = len(value)
    else:
        width = max(set(lengths), key=lambda w: (lengths.count(w), -lengths.index(w)))
    if width == 0:
        return None, [FieldProblem(pointer(*where, 0), f"{what} rows must not be empty")]
    for i, length in enumerate(lengths):
        if length != width:
            problems.append(
                FieldProblem(
                    pointer(*where, i),
                    f"{what} is not rectangular: row {i} has {length} entries, the others {width}",
                )
            )
    if problems:
        return None, problems
    if rows is not None and len(value) != rows:
        problems.append(FieldProblem(pointer(*where), f"{what} has {len(value)} rows, expected {rows}"))
    if cols is not None and width != cols:
        problems.append(FieldProblem(pointer(*where), f"{what} has {width} columns, expected {cols}"))
    if problems:
        return None, problems
    return np.asarray(value, dtype=float), []


def check_weight(
    value: Sequence[Any], where: tuple[str | int, ...], *, size: int, what: str, names: Sequence[str] = ()
) -> tuple[NDArray[np.float64] | None, list[FieldProblem]]:
    """Check a weight given as one non-negative number per signal or a full PSD matrix.

    Parameters
    ----------
    value : list of float or list of lists of float
    where : tuple
        Pointer parts of the field.
    size : int
        Number of signals.
    what : str
        Name for messages, e.g. ``"output weight"``.
    names : sequence of str, optional
        The signals' tags, for the messages.

    Returns
    -------
    array or None, list of FieldProblem
        The weight as given (shape ``(size,)`` or ``(size, size)``) when no problem was found.

    Notes
    -----
    Symmetry is checked to a relative tolerance of 1e-10 of the largest entry; positive
    semidefiniteness by the smallest eigenvalue (``numpy.linalg.eigvalsh``) not below
    ``-1e-10`` times the largest modulus (common practice for rounding in given data).
    """
    if len(value) == 0:
        return None, [FieldProblem(pointer(*where), f"{what} is empty; give {size} numbers")]
    if not isinstance(value[0], list):
        w = np.asarray(value, dtype=float)
        if w.shape != (size,):
            return None, [FieldProblem(pointer(*where), f"{what} has {w.size} entries, expected {size}")]
        negative = [i for i in range(size) if w[i] < 0]
        if negative:
            return None, [
                FieldProblem(
                    pointer(*where, i),
                    f"{what}{f' of {names[i]}' if i < len(names) else ''} must not be negative (got {w[i]:g})",
                )
                for i in negative
            ]
        return w, []
    w, problems = check_matrix(value, where, rows=size, cols=size, what=what)
    if w is None:
        return None, problems
    scale = max(float(np.abs(w).max()), np.finfo(float).tiny)
    if float(np.abs(w - w.T).max()) > 1e-10 * scale:
        return None, [FieldProblem(pointer(*where), f"{what} matrix must be symmetric")]
    smallest = float(np.linalg.eigvalsh(0.5 * (w + w.T))[0])
    if smallest < -1e-10 * scale:
        return None, [
            FieldProblem(
                pointer(*where),
                f"{what} matrix must be positive semidefinite (smallest eigenvalue {smallest:.3g})",
            )
        ]
    return w, []
