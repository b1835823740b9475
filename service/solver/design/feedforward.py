"""Feed-forward from measured disturbances: the disturbance's free response and the gain Kd.

With measured disturbances ``x(k+1) = A x(k) + B u(k) + Bd d(k)``, and ``d`` predicted to
stay at its measured value ``d(k)`` over the horizon (the usual assumption for a measured
step, common practice), the stacked prediction of the design notes gains one term ::

    Z = Fx x(k) + Fu u(k-1) + Fd d(k) + G dU

where block row ``i - Hw`` of ``Fd`` (``i = Hw .. Hp``) is ``Cz sum_{l<i} A^l Bd`` — the
step response of the disturbance channel, built exactly like ``Fu`` with ``Bd`` for ``B``
(plus ``Dd`` if the controlled outputs see the disturbance directly).  The free-response
error becomes ``E = T - Fx x(k) - Fu u(k-1) - Fd d(k)``, so the first move ::

    du(k) = Kh E = Kr r - Kx x(k) - Ku u(k-1) - Kd d(k),       Kd = Kh Fd

``Kh`` does not depend on the disturbance: feed-forward adds one gain and changes neither
the Hessian nor the closed-loop poles.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike, NDArray

from service.solver.design.prediction import step_response_coefficients
from service.solver.design.terminal import terminal_free_disturbance
from service.solver.estimation.target import TargetProblem, target_problem

if TYPE_CHECKING:
    from service.solver.design.controller import ControllerDesign

__all__ = ["design_feedforward_gain", "disturbance_free_response", "feedforward_gain", "measured_target"]


def disturbance_free_response(
    a: ArrayLike,
    b_disturbance: ArrayLike,
    c: ArrayLike,
    *,
    prediction: int,
    first_penalized: int = 1,
    feed_through: ArrayLike | None = None,
) -> NDArray[np.float64]:
    """Return ``Fd``, the predicted controlled outputs per unit disturbance held from now.

    Parameters
    ----------
    a : array_like, shape (n, n)
        Discrete state matrix.
    b_disturbance : array_like, shape (n, md)
        ``Bd``, the measured disturbances' input matrix.
    c : array_like, shape (p, n)
        Controlled-output matrix ``Cz``.
    prediction : int, keyword-only
        ``Hp >= 1``.
    first_penalized : int, keyword-only
        ``1 <= Hw <= Hp`` (default 1).
    feed_through : array_like, shape (p, md), optional
        ``Dd``, added to every block row (the controlled outputs see ``d(k+i) = d(k)``).

    Returns
    -------
    ndarray, shape (Np*p, md)
        Block row ``i - Hw`` is ``Cz sum_{l<i} A^l Bd (+ Dd)``, ``Np = Hp - Hw + 1``.

    Notes
    -----
    The step responses come from
    :func:`service.solver.design.prediction.step_response_coefficients`, the recursion that
    builds ``Fu``.
    """
    hp, hw = prediction, first_penalized
    assert 1 <= hw <= hp, (hp, hw)
    a_ = np.asarray(a, dtype=float)
    bd = np.asarray(b_disturbance, dtype=float)
    c_ = np.asarray(c, dtype=float)
    _, step = step_response_coefficients(a_, bd, c_, hp)
    blocks = step[hw:]  # (Np, p, md)
    if feed_through is not None:
        dd = np.asarray(feed_through, dtype=float)
        assert dd.shape == blocks.shape[1:], (dd.shape, blocks.shape)
        blocks = blocks + dd
    return blocks.reshape(-1, bd.shape[1])


def feedforward_gain(horizon_gain: ArrayLike, free_disturbance: ArrayLike) -> NDArray[np.float64]:
    """Return ``Kd = Kh Fd`` for ``du(k) = Kr r - Kx x(k) - Ku u(k-1) - Kd d(k)``.

    Parameters
    ----------
    horizon_gain : array_like, shape (m, Np*p)
        ``Kh`` (``PredictiveGain.horizon``).
    free_disturbance : array_like, shape (Np*p, md)
        ``Fd`` from :func:`disturbance_free_response`, for the same horizons.

    Returns
    -------
    ndarray, shape (m, md)
    """
    kh = np.asarray(horizon_gain, dtype=float)
    fd = np.asarray(free_disturbance, dtype=float)
    assert kh.shape[1] == fd.shape[0], (kh.shape, fd.shape)
    result: NDArray[np.float64] = kh @ fd
    return result


def design_feedforward_gain(
    design: ControllerDesign,
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    b_disturbance: NDArray[np.float64],
    *,
    target_outputs: bool = False,
    measured: TargetProblem | None = None,
) -> NDArray[np.float64]:
    """Return the whole feed-forward gain ``Kd`` of a design, every term its options add.

    ``Kd = Kh Fd`` (:func:`feedforward_gain`); a held disturbance also moves the steady-state
    target, ``[x_s; u_s]`` by ``S_m d_m`` and its outputs by ``Z_m d_m``
    (:func:`service.solver.estimation.target.with_measured_disturbances`), which adds:

    - ``- Kh (1 (x) Z_m)`` for a law that tracks the target's outputs (``target_outputs``: the
      estimator's law, whose setpoint gain is ``Kh (1 (x) Z_r)``), where a setpoint is not
      reachable (``Z_m = 0`` otherwise): the best fit to the setpoint moves with the
      disturbance, and ``E`` with it.  /design's own law tracks ``r`` itself (``Kr = Kh (1 (x)
      I)``) and leaves this term out;
    - ``+ Kt (Phi_m - S_m)`` with the Riccati terminal weight (the held disturbance moves both
      the free terminal prediction and the steady state,
      :func:`service.solver.design.terminal.terminal_free_disturbance`);
    - ``- Kt0 U_m`` with input targets (``U_m`` the input rows of ``S_m``: the target's inputs
      move with the disturbance).

    /design's answer and the fixed law of /simulate and the export take it from here, so the
    terms cannot part.  The target's ``S_m`` and ``Z_m`` come from one target problem
    (:func:`measured_target`).

    Parameters
    ----------
    design : ControllerDesign
        Designed on ``(a, b, c)``.
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
        The model the design was made on (no disturbance states).
    b_disturbance : ndarray, shape (n, md)
        ``Bd`` of the measured disturbances, in the same signals.
    target_outputs : bool, optional
        Whether the law tracks the steady-state target's outputs ``Z_r r + Z_m d_m`` (default
        False: it tracks ``r``).
    measured : TargetProblem, optional
        :func:`measured_target` of the same arguments, when the caller has it (formed here
        otherwise).

    Returns
    -------
    ndarray, shape (m, md)
        ``du(k) = ... - Kd d_m(k)``.
    """
    pred = design.prediction
    fd = disturbance_free_response(
        a, b_disturbance, c, prediction=pred.prediction, first_penalized=pred.first_penalized
    )
    kh = design.gain.horizon
    kd = feedforward_gain(kh, fd)
    if measured is None:
        measured = measured_target(a, b, c, b_disturbance, design)
    z_m = measured.output_disturbance_map  # (p, md)
    if target_outputs and np.any(z_m):  # - Kh (1 (x) Z_m)
        kd = kd - kh @ np.tile(z_m, (fd.shape[0] // z_m.shape[0], 1))
    if design.terminal is not None and design.terminal_gain is not None:  # + Kt (Phi_m - S_m)
        free = terminal_free_disturbance(a, b_disturbance, inputs=b.shape[1], prediction=pred.prediction)
        kd = kd + design.terminal_gain @ (free - measured.disturbance_map)
    if design.input_target_gain is not None and design.input_weight is not None:  # - Kt0 U_m
        kd = kd - design.input_target_gain @ measured.disturbance_map[a.shape[0] :]
    return kd


def measured_target(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    b_disturbance: NDArray[np.float64],
    design: ControllerDesign,
) -> TargetProblem:
    """The target equations of ``(a, b, c)`` with the measured disturbances as their disturbances.

    Weighted as the design's own target (``Q``, and ``S`` with input targets), so that its
    ``disturbance_map`` is ``S_m`` (n+m, md) and its ``output_disturbance_map`` is ``Z_m`` (p, md)
    of :func:`service.solver.estimation.target.with_measured_disturbances`.
    """
    return target_problem(
        a,
        b,
        c,
        disturbance_input=b_disturbance,
        output_weight=design.output_weight,
        input_weight=design.input_weight,
    )
