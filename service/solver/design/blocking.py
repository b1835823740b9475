"""Move blocking: moves allowed only at listed steps of the control horizon.

A blocking is a sorted list of step indices ``0 = j_0 < j_1 < ... < j_(nb-1) < Hu`` at which
the controller may move; at every other step of the control horizon the move is zero, so the
input is *held* from one listed step to the next (the input is piecewise constant over the
blocks; common practice for long horizons with few degrees of freedom).  With
``dU = M dU_b`` and ``M`` (Hu*m x nb*m) the 0/1 matrix that puts free move ``l`` at step
``j_l`` ::

    Z = Fx x(k) + Fu u(k-1) + (G M) dU_b,     H_b = M' H M = (G M)' Q (G M) + blockdiag_nb(R)

so blocking is a selection of the columns of ``G`` (and of any other move matrix, such as the
terminal prediction's ``Gamma``); the move weight applies to each free move.  Since ``j_0 = 0``
the first free move is ``du(k)``, so ``Kh``, ``Kx``, ``Ku`` and ``Kr`` keep their meaning.
Listing every step ``0 .. Hu-1`` selects every column in order: exactly no blocking.

The schema edge checks the list (first 0, strictly increasing, below ``Hu``); the solver
only asserts it.
"""

from __future__ import annotations

import dataclasses
import itertools
from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray

from service.solver.design.prediction import Prediction

__all__ = [
    "blocked_columns",
    "blocked_prediction",
    "blocking_matrix",
    "check_blocking",
    "expand_moves",
    "select_moves",
]


def check_blocking(steps: Sequence[int], *, control: int) -> tuple[int, ...]:
    """Assert that ``steps`` is a valid blocking for control horizon ``Hu`` and return it as a tuple.

    Parameters
    ----------
    steps : sequence of int
        Free move steps, 0-based.
    control : int
        ``Hu``.

    Returns
    -------
    tuple of int
    """
    free = tuple(int(j) for j in steps)
    assert free and free[0] == 0, f"blocking must start at step 0, got {free}"
    assert all(a < b for a, b in itertools.pairwise(free)), f"blocking steps must increase strictly, got {free}"
    assert free[-1] < control, f"blocking step {free[-1]} is not below the control horizon {control}"
    return free


def blocked_columns(steps: Sequence[int], *, inputs: int) -> NDArray[np.intp]:
    """Return the column indices of the free moves in a ``(., Hu*m)`` move matrix.

    Parameters
    ----------
    steps : sequence of int
        Free move steps (checked by :func:`check_blocking`).
    inputs : int
        ``m``.

    Returns
    -------
    ndarray of int, shape (nb*m,)
        ``j*m + i`` for each free step ``j`` (in order) and input ``i``.
    """
    return (np.asarray(steps, dtype=np.intp)[:, None] * inputs + np.arange(inputs)[None, :]).reshape(-1)


def blocking_matrix(steps: Sequence[int], *, control: int, inputs: int) -> NDArray[np.float64]:
    """Return the 0/1 matrix ``M`` (Hu*m x nb*m) with ``dU = M dU_b``.

    Parameters
    ----------
    steps : sequence of int
    control : int
        ``Hu``.
    inputs : int
        ``m``.

    Returns
    -------
    ndarray, shape (Hu*m, nb*m)
    """
    free = check_blocking(steps, control=control)
    columns = blocked_columns(free, inputs=inputs)
    matrix = np.zeros((control * inputs, columns.size))
    matrix[columns, np.arange(columns.size)] = 1.0
    return matrix


def select_moves(matrix: NDArray[np.float64], steps: Sequence[int], *, inputs: int) -> NDArray[np.float64]:
    """Return ``matrix @ M`` as a column selection (exact: no arithmetic on the entries).

    Parameters
    ----------
    matrix : ndarray, shape (rows, Hu*m)
        A move matrix such as ``G`` or the terminal ``Gamma``.
    steps : sequence of int
    inputs : int
        ``m``.

    Returns
    -------
    ndarray, shape (rows, nb*m)
    """
    return np.ascontiguousarray(matrix[:, blocked_columns(steps, inputs=inputs)])


def blocked_prediction(prediction: Prediction, steps: Sequence[int]) -> Prediction:
    """Return the prediction with ``G`` replaced by ``G M`` (the free moves' columns only).

    Parameters
    ----------
    prediction : Prediction
    steps : sequence of int
        Free move steps, checked against ``prediction.control``.

    Returns
    -------
    Prediction
        ``moves`` of shape (Np*p, nb*m); every other field, ``control = Hu`` included,
        unchanged.
    """
    free = check_blocking(steps, control=prediction.control)
    inputs = prediction.free_input.shape[1]
    return dataclasses.replace(prediction, selected_moves=select_moves(prediction.moves, free, inputs=inputs))


def expand_moves(
    blocked: NDArray[np.float64], steps: Sequence[int], *, control: int, inputs: int
) -> NDArray[np.float64]:
    """Return the whole move sequence ``dU = M dU_b`` (zeros at the blocked steps).

    Parameters
    ----------
    blocked : ndarray, shape (nb*m,)
        Free moves ``[du(k+j_0); du(k+j_1); ...]``.
    steps : sequence of int
    control : int
        ``Hu``.
    inputs : int
        ``m``.

    Returns
    -------
    ndarray, shape (Hu*m,)
    """
    full = np.zeros(control * inputs)
    full[blocked_columns(check_blocking(steps, control=control), inputs=inputs)] = blocked
    return full
