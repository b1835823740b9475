"""Input targets: a weight on ``u - u_target`` over the control horizon's predicted inputs.

With an input weight ``S`` (m x m, symmetric positive semidefinite) the cost of the design
notes gains the term ::

    sum_{j=0}^{Hu-1} |u(k+j|k) - u_t|^2_S,    u(k+j|k) = u(k-1) + du(k) + ... + du(k+j)

Stacked, ``u(k+j|k) - u_t = L_j dU - e`` with ``e = u_t - u(k-1)`` and ``L`` the block
lower-triangular matrix of identity blocks, so the term is ``|L dU - (1 (x) I_m) e|^2_S``.
Its Hessian and linear parts are, block by block (``j, l = 0..Hu-1``), ::

    (L' Sbar L)_(j,l) = (Hu - max(j, l)) S,        (L' Sbar (1 (x) I_m))_j = (Hu - j) S

so the Hessian becomes ``H = G'QG + R + L'SbarL`` and the optimal moves
``dU* = H^-1 (G'Q E + P e)`` with ``P = L' Sbar (1 (x) I_m)`` (the *pull* of the targets).  The
first move is ``du(k) = Kh E + Kt0 (u_t - u(k-1))`` with ``Kt0`` the first m rows of
``H^-1 P``.  With move blocking (a column selection ``M`` of the moves,
:mod:`service.solver.design.blocking`) ``L`` becomes ``L M``: the free steps' rows and columns
of both blocks.  The penalty is the one of a weighted least-squares term in the moves
(common practice; the same normal equations as :mod:`service.solver.design.gain`).

The input target the controller tracks is the steady-state target's input ``u_s``
(:mod:`service.solver.estimation.target`, the same ``S``), not the raw ``u_t``: at the target
``(x_s, u_s)`` the error ``E`` and ``u_s - u`` both vanish, so it is the loop's fixed point and
a reachable setpoint is met exactly.  With ``u_s = U_r r + U_t u_t`` (no disturbance), the law
in terms of the raw setpoint and input targets is ::

    du(k) = (Kr + Kt0 U_r) r + Kt0 U_t u_t - Kx x(k) - (Ku + Kt0) u(k-1)

which :func:`with_input_target` returns as the design's gains (``Kt = Kt0 U_t``).

Measured disturbances.  A measured disturbance ``d_m`` held at its value moves the target too:
the steady state under ``Bd d_m`` needs other inputs, ``u_s = U_r r + U_t u_t + U_m d_m`` with
``U_m`` the input rows of the target's disturbance map for ``Bd`` (the same ``Q`` and ``S``).
Pulling the inputs towards the target without ``U_m d_m`` pulls them away from the steady state
that holds the outputs on their setpoints, and the loop settles with an offset.  So the
feed-forward gain ``Kd`` of ``du = ... - Kd d_m`` (:mod:`service.solver.design.feedforward`) gains
``- Kt0 U_m`` (:func:`service.solver.design.feedforward.measured_target`).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.solver.design.gain import FactoredHessian, PredictiveGain

__all__ = ["InputPenalty", "input_penalty", "input_target_gain", "with_input_target"]


@dataclass(frozen=True)
class InputPenalty:
    """The input-target term of the cost in the free moves.

    Attributes
    ----------
    weight : ndarray, shape (m, m)
        ``S``.
    hessian : ndarray, shape (k*m, k*m)
        ``(L M)' Sbar (L M)`` with ``k`` free move steps (``Hu`` without blocking).
    pull : ndarray, shape (k*m, m)
        ``P = (L M)' Sbar (1 (x) I_m)``: the linear term is ``P (u_t - u(k-1))``.
    """

    weight: NDArray[np.float64]
    hessian: NDArray[np.float64]
    pull: NDArray[np.float64]


def input_penalty(
    input_weight: NDArray[np.float64], *, control: int, free: Sequence[int] | None = None
) -> InputPenalty:
    """Return the Hessian and linear blocks of the input-target term (module notes).

    Parameters
    ----------
    input_weight : ndarray, shape (m, m)
        ``S``, symmetric positive semidefinite.
    control : int
        ``Hu``.
    free : sequence of int, optional
        The free move steps with blocking (default every step ``0..Hu-1``).

    Returns
    -------
    InputPenalty
    """
    steps = np.arange(control) if free is None else np.asarray(free, dtype=int)
    count = control - np.maximum(steps[:, None], steps[None, :])  # Hu - max(j, l)
    hessian = np.kron(count.astype(float), input_weight)
    pull = np.kron((control - steps).astype(float)[:, None], input_weight)
    return InputPenalty(weight=input_weight, hessian=hessian, pull=pull)


def input_target_gain(hessian: FactoredHessian, penalty: InputPenalty) -> NDArray[np.float64]:
    """Return ``Kt0``, the first m rows of ``H^-1 P`` (shape (m, m)).

    ``H^-1`` is symmetric, so the first m rows of ``H^-1 P`` are ``Y' P`` with
    ``Y = H^-1 [I_m; 0]`` (m pairs of triangular solves).
    """
    m = penalty.weight.shape[0]
    selector = np.zeros((hessian.matrix.shape[0], m))
    selector[:m, :m] = np.eye(m)
    y = hessian.solve(selector)
    result: NDArray[np.float64] = y.T @ penalty.pull
    return result


def with_input_target(
    gain: PredictiveGain,
    target_gain: NDArray[np.float64],
    *,
    setpoint_input: NDArray[np.float64],
    target_input: NDArray[np.float64],
) -> PredictiveGain:
    """Fold the input-target term into the law on the raw setpoint and input targets.

    Parameters
    ----------
    gain : PredictiveGain
        ``Kh``, ``Kx``, ``Ku = Kh Fu``, ``Kr`` of the design with the input weight in ``H``.
    target_gain : ndarray, shape (m, m)
        ``Kt0`` (:func:`input_target_gain`).
    setpoint_input : ndarray, shape (m, p)
        ``U_r``: how the steady-state target's inputs follow the setpoint.
    target_input : ndarray, shape (m, m)
        ``U_t``: how they follow the input targets.

    Returns
    -------
    PredictiveGain
        ``Kr + Kt0 U_r``, ``Ku + Kt0``, and ``input_target = Kt0 U_t`` (added to the gain's own,
        the terminal weight's ``Kt S_t``, when it has one); ``Kh`` and ``Kx`` as given.
    """
    pull = target_gain @ target_input
    return dataclasses.replace(
        gain,
        previous_input=gain.previous_input + target_gain,
        setpoint=gain.setpoint + target_gain @ setpoint_input,
        input_target=pull if gain.input_target is None else gain.input_target + pull,
    )
