"""The unconstrained controller with its estimator as a discrete LTI system from y to u.

Without limits the controller is linear and time invariant, so the classical and
multivariable tools of frequency analysis apply to it (setpoint held at zero).

Full state (``y = x``, no estimator).  ``du(k) = -Kx x(k) - Ku u(k-1)`` and
``u(k) = u(k-1) + du(k)`` give, on the controller state ``s(k) = u(k-1)`` ::

    s(k+1) = (I - Ku) s(k) - Kx y(k),       u(k) = (I - Ku) s(k) - Kx y(k)

With an estimator in current-estimator form (:mod:`service.solver.estimation.estimator`) on the model
``(A_a, B_a, Cy)`` with filter gain ``L`` and a state-feedback gain ``K`` on the estimate ::

    x(k|k)   = (I - L Cy) x(k|k-1) + L y(k)
    u(k)     = (I - Ku) u(k-1) - K x(k|k)
    x(k+1|k) = A_a x(k|k) + B_a u(k)

so on ``s = [x(k|k-1); u(k-1)]`` the controller is ``s(k+1) = Ac s + Bc y``,
``u = Cc s + Dc y`` with ::

    Cc = [-K (I - L Cy),  I - Ku],          Dc = -K L
    Ac = [[A_a (I - L Cy), 0], [0, 0]] + [B_a; I] Cc
    Bc = [A_a L; 0] + [B_a; I] Dc

(substitution; the direct feed-through ``Dc`` is the current estimator's).  ``K`` acts on the
whole augmented estimate: with disturbance states the controller predicts the disturbance's
effect and aims at the disturbance-corrected target of :mod:`service.solver.estimation.target` ::

    K = Kh (Fx_a - (1 (x) I_p) Z_d S) + Kt (Phi_a - S_d S)

``Fx_a`` stacking ``Cz_a A_a^i`` (i = Hw..Hp), ``Z_d``/``S_d`` the target's disturbance maps,
``S`` the selection of the disturbance estimate, and the terminal part (``Kt``, the
terminal prediction ``Phi_a`` of ``x(k+Hp)`` from the augmented estimate) only with the
Riccati terminal weight.  The plant part of ``K`` is the design's ``Kx``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.solver.design.controller import ControllerDesign
from service.solver.design.prediction import step_response_coefficients
from service.solver.design.terminal import terminal_prediction
from service.solver.estimation.estimator import Estimator
from service.solver.estimation.loop import estimator_target
from service.solver.numerics import by_modulus

__all__ = [
    "StateSpace",
    "closed_loop_poles",
    "controller_system",
    "estimate_feedback_gain",
    "estimator_controller",
    "full_state_controller",
    "plant_system",
    "with_feedthrough_correction",
]


@dataclass(frozen=True)
class StateSpace:
    """A discrete LTI system ``s(k+1) = A s + B w``, ``v = C s + D w``.

    Attributes
    ----------
    a : ndarray, shape (ns, ns)
    b : ndarray, shape (ns, ni)
    c : ndarray, shape (no, ns)
    d : ndarray, shape (no, ni)
    """

    a: NDArray[np.float64]
    b: NDArray[np.float64]
    c: NDArray[np.float64]
    d: NDArray[np.float64]

    @property
    def inputs(self) -> int:
        return int(self.d.shape[1])

    @property
    def outputs(self) -> int:
        return int(self.d.shape[0])

    def evaluate(self, z: NDArray[np.complex128]) -> NDArray[np.complex128]:
        """Return the transfer matrix ``C (z I - A)^-1 B + D`` at each point of ``z``.

        Parameters
        ----------
        z : ndarray of complex, shape (N,)
            Points of the complex plane (``e^(j w Ts)`` for a frequency response).

        Returns
        -------
        ndarray of complex, shape (N, no, ni)
            One linear solve per point (``numpy.linalg.solve``, batched); no inverse.
        """
        z = np.asarray(z, dtype=complex).reshape(-1)
        value = np.broadcast_to(self.d.astype(complex), (z.size, *self.d.shape)).copy()
        ns = self.a.shape[0]
        if ns:
            shifted = z[:, None, None] * np.eye(ns) - self.a
            value += self.c @ np.linalg.solve(shifted, np.broadcast_to(self.b, (z.size, *self.b.shape)))
        return value


def plant_system(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    d: NDArray[np.float64] | None = None,
) -> StateSpace:
    """Return the plant ``x(k+1) = A x + B u``, ``y = C x + D u`` as a :class:`StateSpace`.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (py, n)
        Measured outputs (the identity for ``y = x``).
    d : ndarray, shape (py, m), optional
        The measured feed-through ``D_m`` (default zero: strictly proper).
    """
    a_, b_, c_ = (np.asarray(x, dtype=float) for x in (a, b, c))
    d_ = np.zeros((c_.shape[0], b_.shape[1])) if d is None else np.asarray(d, dtype=float)
    return StateSpace(a=a_, b=b_, c=c_, d=d_.copy())


def full_state_controller(state_gain: NDArray[np.float64], previous_input: NDArray[np.float64]) -> StateSpace:
    """Return the controller ``y = x -> u`` of the law ``du = -Kx x - Ku u(k-1)``.

    Parameters
    ----------
    state_gain : ndarray, shape (m, n)
        ``Kx``.
    previous_input : ndarray, shape (m, m)
        ``Ku``.

    Returns
    -------
    StateSpace
        On ``s = u(k-1)``: ``A = C = I - Ku``, ``B = D = -Kx`` (module notes).
    """
    hold = np.eye(previous_input.shape[0]) - previous_input
    return StateSpace(a=hold, b=-state_gain, c=hold.copy(), d=-state_gain.copy())


def estimator_controller(
    feedback: NDArray[np.float64],
    previous_input: NDArray[np.float64],
    *,
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c_measured: NDArray[np.float64],
    filter_gain: NDArray[np.float64],
) -> StateSpace:
    """Return the controller ``y -> u`` of a state feedback on a current estimator.

    Parameters
    ----------
    feedback : ndarray, shape (m, na)
        ``K``: ``du = -K x(k|k) - Ku u(k-1)``.
    previous_input : ndarray, shape (m, m)
        ``Ku``.
    a : ndarray, shape (na, na)
        Model state matrix ``A_a`` (augmented with disturbance states if any).
    b : ndarray, shape (na, m)
        ``B_a``.
    c_measured : ndarray, shape (py, na)
        ``Cy``.
    filter_gain : ndarray, shape (na, py)
        ``L`` of ``x(k|k) = x(k|k-1) + L (y - Cy x(k|k-1))``.

    Returns
    -------
    StateSpace
        On ``s = [x(k|k-1); u(k-1)]`` (na + m states), py inputs, m outputs; the matrices of
        the module notes.
    """
    na, m = b.shape
    update = np.eye(na) - filter_gain @ c_measured  # I - L Cy
    cc = np.hstack([-feedback @ update, np.eye(m) - previous_input])
    dc = -feedback @ filter_gain
    into = np.vstack([b, np.eye(m)])  # where u(k) enters s(k+1)
    ac = np.zeros((na + m, na + m))
    ac[:na, :na] = a @ update
    ac += into @ cc
    bc = np.vstack([a @ filter_gain, np.zeros((m, filter_gain.shape[1]))]) + into @ dc
    return StateSpace(a=ac, b=bc, c=cc, d=dc)


def estimate_feedback_gain(design: ControllerDesign, estimator: Estimator) -> NDArray[np.float64]:
    """Return ``K`` (m, na), the design's feedback on the augmented estimate (module notes).

    Parameters
    ----------
    design : ControllerDesign
    estimator : Estimator
        Of the same plant as ``design``.

    Returns
    -------
    ndarray, shape (m, na)
        Its first ``n`` columns equal the design's ``Kx``.
    """
    pred = design.prediction
    hp, hw = pred.prediction, pred.first_penalized
    n, na = estimator.state_size, estimator.augmented_size
    c_powers, _ = step_response_coefficients(estimator.a, estimator.b, estimator.c_controlled, hp)
    free_state = c_powers[hw:].reshape(-1, na)  # Fx_a
    select = np.zeros((estimator.disturbance_size, na))
    select[:, estimator.disturbance_slice] = np.eye(estimator.disturbance_size)
    target = estimator_target(design, estimator)
    corrected = np.tile(target.output_disturbance_map @ select, (pred.penalized_steps, 1))
    gain = design.gain.horizon @ (free_state - corrected)
    if design.input_target_gain is not None:  # the input penalty pulls towards u_s = ... + U_d d
        gain = gain - design.input_target_gain @ target.disturbance_map[n:] @ select
    if design.terminal is not None and design.terminal_gain is not None:
        phi, _ = terminal_prediction(estimator.a, estimator.b, prediction=hp, control=pred.control, states=n)
        gain = gain + design.terminal_gain @ (phi[:, :na] - target.disturbance_map @ select)
    return gain


def with_feedthrough_correction(controller: StateSpace, feedthrough: NDArray[np.float64]) -> StateSpace:
    """Return the controller ``y -> u`` that reads ``e = y - D_m u`` with its own command ``u``.

    ``controller`` maps the corrected measurement ``e`` to ``u``: ``s+ = Ac s + Bc e``,
    ``u = Cc s + Dc e``.  With ``e = y - D_m u`` the command solves ``(I + Dc D_m) u = Cc s +
    Dc y`` (substitution), so with ``M = (I + Dc D_m)^-1`` ::

        u  = M Cc s + M Dc y
        s+ = (Ac - Bc D_m M Cc) s + Bc (I - D_m M Dc) y

    Parameters
    ----------
    controller : StateSpace
        ``e -> u`` (py inputs, m outputs).
    feedthrough : ndarray, shape (py, m)
        ``D_m``.

    Returns
    -------
    StateSpace
        ``y -> u``, the same states.

    Raises
    ------
    numpy.linalg.LinAlgError
        When ``I + Dc D_m`` is singular (the command is not determined by the measurement).
    """
    dm = np.asarray(feedthrough, dtype=float)
    m = controller.outputs
    solve = np.linalg.solve(np.eye(m) + controller.d @ dm, np.hstack([controller.c, controller.d]))
    mc, md = solve[:, : controller.c.shape[1]], solve[:, controller.c.shape[1] :]  # M Cc, M Dc
    return StateSpace(
        a=controller.a - controller.b @ dm @ mc,
        b=controller.b @ (np.eye(dm.shape[0]) - dm @ md),
        c=mc,
        d=md,
    )


def controller_system(design: ControllerDesign, estimator: Estimator | None = None) -> StateSpace:
    """Return the controller ``y -> u`` of a design, with its estimator or on the full state.

    With a measured feed-through (``estimator.feedthrough``, ``D_m``) the estimator reads
    ``y - D_m u(k)`` of its own command: :func:`with_feedthrough_correction`.

    Parameters
    ----------
    design : ControllerDesign
    estimator : Estimator, optional
        ``None`` or a ``full_state`` estimator: ``y = x`` and :func:`full_state_controller`.

    Returns
    -------
    StateSpace
    """
    if estimator is None or estimator.full_state:
        return full_state_controller(design.gain.state, design.gain.previous_input)
    controller = estimator_controller(
        estimate_feedback_gain(design, estimator),
        design.gain.previous_input,
        a=estimator.a,
        b=estimator.b,
        c_measured=estimator.c_measured,
        filter_gain=estimator.gain,
    )
    if np.any(estimator.feedthrough):
        return with_feedthrough_correction(controller, estimator.feedthrough)
    return controller


def closed_loop_poles(plant: StateSpace, controller: StateSpace) -> NDArray[np.complex128]:
    """Return the poles of the loop ``u = K y`` around the plant, by descending modulus.

    Parameters
    ----------
    plant : StateSpace
        ``y = C x + D u``.
    controller : StateSpace
        From the plant's outputs to its inputs.

    Returns
    -------
    ndarray of complex, shape (n + ns,)
        Eigenvalues of ``[[A + B N Dc C, B N Cc], [Bc (C + D N Dc C), Ac + Bc D N Cc]]`` with
        ``N = (I - Dc D)^-1`` (substitution of ``u`` and ``y``); for a strictly proper plant
        ``N = I`` and this is ``[[A + B Dc C, B Cc], [Bc C, Ac]]``.
    """
    if np.any(plant.d):
        m = plant.inputs
        n_cc, n_dc = np.split(
            np.linalg.solve(np.eye(m) - controller.d @ plant.d, np.hstack([controller.c, controller.d @ plant.c])),
            [controller.c.shape[1]],
            axis=1,
        )
        matrix = np.block(
            [
                [plant.a + plant.b @ n_dc, plant.b @ n_cc],
                [controller.b @ (plant.c + plant.d @ n_dc), controller.a + controller.b @ plant.d @ n_cc],
            ]
        )
    else:
        matrix = np.block(
            [
                [plant.a + plant.b @ controller.d @ plant.c, plant.b @ controller.c],
                [controller.b @ plant.c, controller.a],
            ]
        )
    return by_modulus(np.linalg.eigvals(matrix))
