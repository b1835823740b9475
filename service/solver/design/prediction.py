"""Prediction matrices of the incremental MPC formulation, built by recursion.

For ``x(k+1) = A x(k) + B u(k)`` and controlled outputs ``z = C x``, with moves
``du(k+j)`` for ``j = 0 .. Hu-1`` (zero afterwards), the predictions over the penalized
steps ``i = Hw .. Hp`` stack as ::

    Z = Fx x(k) + Fu u(k-1) + G dU

with, for step ``i`` (block row ``i - Hw``)::

    Fx_i = C A^i                                   (free response to the state)
    Fu_i = S_i = C (A^0 + ... + A^(i-1)) B          (free response to the held input)
    G_ij = S_(i-j) for j < i, 0 otherwise          (block step-response matrix)

``S_i`` is the step response of the plant ``i`` samples after a unit step in the input.
Everything comes from one recursion ``C A^i = (C A^(i-1)) A``; no matrix power is formed.
This is the standard condensed formulation of discrete-time MPC in incremental ("velocity")
form (common practice); each block follows by substituting the state equation into itself.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

__all__ = ["Prediction", "block_toeplitz", "prediction_matrices", "step_response_coefficients"]


@dataclass(frozen=True)
class Prediction:
    """The stacked prediction ``Z = Fx x + Fu u(k-1) + G dU`` over steps Hw..Hp.

    Attributes
    ----------
    free_state : ndarray, shape (Np*p, n)
        ``Fx``; block row ``i - Hw`` is ``C A^i``.  ``Np = Hp - Hw + 1``.
    free_input : ndarray, shape (Np*p, m)
        ``Fu``; block row ``i - Hw`` is the step response ``S_i``.
    step_response : ndarray, shape (Hp+1, p, m)
        ``S_0 = 0, S_1, ..., S_Hp``.
    prediction, control, first_penalized : int
        ``Hp``, ``Hu`` and ``Hw``.
    selected_moves : ndarray, shape (Np*p, nb*m), or None
        ``G M``, the free moves' columns of ``G`` under move blocking
        (:func:`service.solver.design.blocking.blocked_prediction`); ``None``: every move is
        free and :attr:`moves` is the whole block-Toeplitz ``G``.
    """

    free_state: NDArray[np.float64]
    free_input: NDArray[np.float64]
    step_response: NDArray[np.float64]
    prediction: int
    control: int
    first_penalized: int
    selected_moves: NDArray[np.float64] | None = None

    @functools.cached_property
    def moves(self) -> NDArray[np.float64]:
        """``G``, shape (Np*p, Hu*m) (or ``G M`` with blocking): the step-response matrix of the moves.

        Block lower-triangular (block Toeplitz in ``S_k``), formed on first use and kept:
        the unconstrained design never needs it (its Hessian and gains come from the
        Toeplitz structure and ``Wbar G``), and at 4000 x 1000 it is 32 MB and a few
        milliseconds of memory traffic.  The move QP and move blocking read it.
        """
        if self.selected_moves is not None:
            return self.selected_moves
        return block_toeplitz(
            self.step_response, prediction=self.prediction, control=self.control, first_penalized=self.first_penalized
        )

    @property
    def move_columns(self) -> int:
        """Columns of :attr:`moves` (``Hu m``, or ``nb m`` with blocking), without forming it."""
        if self.selected_moves is not None:
            return int(self.selected_moves.shape[1])
        return self.control * int(self.step_response.shape[2])

    @property
    def penalized_steps(self) -> int:
        """``Np = Hp - Hw + 1``, the number of penalized prediction steps."""
        return self.prediction - self.first_penalized + 1


def step_response_coefficients(
    a: NDArray[np.float64], b: NDArray[np.float64], c: NDArray[np.float64], steps: int
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Return ``C A^i`` for ``i = 0..steps`` and the step responses ``S_0..S_steps``.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
    steps : int
        Last step ``Hp`` (>= 1).

    Returns
    -------
    c_powers : ndarray, shape (steps+1, p, n)
        ``C A^i``.
    step : ndarray, shape (steps+1, p, m)
        ``S_i = sum_{l<i} C A^l B``, ``S_0 = 0``.
    """
    n = a.shape[0]
    p, m = c.shape[0], b.shape[1]
    c_powers = np.empty((steps + 1, p, n))
    c_powers[0] = c
    for i in range(1, steps + 1):
        c_powers[i] = c_powers[i - 1] @ a
    # S_i = S_{i-1} + C A^{i-1} B: one stacked product, then the running sum in step order
    # (the same additions in the same order as a loop, so the same numbers)
    step = np.zeros((steps + 1, p, m))
    np.cumsum(c_powers[:-1] @ b, axis=0, out=step[1:])
    return c_powers, step


def prediction_matrices(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    *,
    prediction: int,
    control: int,
    first_penalized: int = 1,
) -> Prediction:
    """Build ``Fx``, ``Fu`` and ``G`` for horizons ``Hp``, ``Hu`` and first penalized step ``Hw``.

    Parameters
    ----------
    a : ndarray, shape (n, n)
        Discrete state matrix.
    b : ndarray, shape (n, m)
        Input matrix (manipulated variables only).
    c : ndarray, shape (p, n)
        Controlled-output matrix (strictly proper: no feed-through).
    prediction : int
        Prediction horizon ``Hp >= 1``.
    control : int
        Control horizon ``1 <= Hu <= Hp``.
    first_penalized : int, optional
        First penalized step ``1 <= Hw <= Hp`` (default 1).

    Returns
    -------
    Prediction
    """
    hp, hu, hw = prediction, control, first_penalized
    assert 1 <= hu <= hp and 1 <= hw <= hp, (hp, hu, hw)
    c_powers, step = step_response_coefficients(a, b, c, hp)
    free_state = c_powers[hw:].reshape(-1, a.shape[0])
    free_input = step[hw:].reshape(-1, b.shape[1])
    return Prediction(
        free_state=free_state,
        free_input=free_input,
        step_response=step,
        prediction=hp,
        control=hu,
        first_penalized=hw,
    )


def block_toeplitz(
    blocks: NDArray[np.float64], *, prediction: int, control: int, first_penalized: int = 1
) -> NDArray[np.float64]:
    """Return the block-Toeplitz matrix with block ``(i, j)`` equal to ``blocks[i - j]``.

    Parameters
    ----------
    blocks : ndarray, shape (Hp+1, r, m)
        ``X_0 = 0, X_1, ..., X_Hp``: the step responses ``S_k`` for ``G``, or ``W S_k`` for
        the weighted ``Wbar G``.
    prediction, control, first_penalized : int, keyword-only
        ``Hp``, ``Hu`` and ``Hw``.

    Returns
    -------
    ndarray, shape (Np*r, Hu*m)
        Block row ``i - Hw`` (step ``i = Hw .. Hp``), block column ``j = 0 .. Hu-1``:
        ``X_(i-j)``, zero for ``i - j <= 0``.

    Notes
    -----
    The blocks are laid side by side once, newest first, ``[X_Hp, ..., X_1, X_0, 0 ...]``
    (``r x (Hp+Hu) m``, small enough to stay in cache); block row ``i`` is then the window
    of ``Hu m`` columns starting at ``X_i``, so the result is written in one pass, copied
    exactly (a gather of ``blocks[i - j]`` and a transpose cost two passes over the result,
    which for ``G`` of 4000 x 1000 took 10 ms against 2.4 ms, measured side by side).
    """
    hp, hu, hw = prediction, control, first_penalized
    rows, m = blocks.shape[1], blocks.shape[2]
    side = np.zeros((rows, (hp + hu) * m))
    side[:, : (hp + 1) * m] = blocks[::-1].transpose(1, 0, 2).reshape(rows, -1)
    result = np.empty(((hp - hw + 1) * rows, hu * m))
    for i in range(hw, hp + 1):
        start = (hp - i) * m
        result[(i - hw) * rows : (i - hw + 1) * rows] = side[:, start : start + hu * m]
    return result
