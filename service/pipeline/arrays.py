"""Checks shared by the pipeline's modules: matrices given as lists of rows, and weights.

Each returns the array when the value passed, and one FieldProblem per broken rule, naming
the field by JSON pointer.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.errors import FieldProblem
from service.pipeline.problems import pointer
from service.solver.numerics import jacobi_scaled

__all__ = ["check_matrix", "check_weight"]


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
    ``-1e-10`` times the largest modulus (common practice for rounding in given data), and by
    the smallest eigenvalue of the matrix with every row and column divided by the square
    root of its diagonal entry (:func:`service.solver.numerics.jacobi_scaled`; for a
    covariance the correlation matrix) not below ``-1e-10``.  The second test is free of
    units: without it a covariance of signals of very different sizes (a variance of 1e-10
    beside one of 100) passed with a correlation of 5 between two of them, as the first
    test's tolerance follows the largest entry.
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
    full, problems = check_matrix(value, where, rows=size, cols=size, what=what)
    if full is None:
        return None, problems
    w = full
    scale = max(float(np.abs(w).max()), np.finfo(float).tiny)
    if float(np.abs(w - w.T).max()) > 1e-10 * scale:
        return None, [FieldProblem(pointer(*where), f"{what} matrix must be symmetric")]
    symmetric = 0.5 * (w + w.T)
    smallest = float(np.linalg.eigvalsh(symmetric)[0])
    unit_free = float(np.linalg.eigvalsh(jacobi_scaled(symmetric))[0])
    if smallest < -1e-10 * scale or unit_free < -1e-10:
        return None, [
            FieldProblem(
                pointer(*where),
                f"{what} matrix must be positive semidefinite (smallest eigenvalue {smallest:.3g}; "
                f"{unit_free:.3g} with each row and column divided by the square root of its diagonal "
                f"entry, a figure no change of units moves)",
            )
        ]
    return w, []
