"""The controller as it runs on an estimate, and the poles of the whole loop.

A :class:`ControlLoop` joins a design (the gain ``Kh``), an estimator and the steady-state
target.  At every step, with ``x(k|k)`` the augmented estimate (plant states and disturbance
estimate, or the measured state for ``full_state``) ::

    z_s(k) = Z_r r(k) + Z_d d(k|k)                        target outputs (target.py)
    free   = Fx_aug x(k|k) + Fu u(k-1)                     free prediction, disturbance included
    E      = (1 (x) I_p) z_s(k) - free                     error over the horizon
    du(k)  = Kh E                                          (or a constrained policy on E)

``Fx_aug`` stacks ``[Cz, Dz] A_aug^i`` for ``i = Hw..Hp``: the prediction carries the constant
disturbance estimate forward, which is what makes the loop offset-free.  ``Fu`` is the
design's (the disturbance states do not respond to ``u``).

The whole loop, with the plant equal to the model, on ``[x(k); x(k|k-1); u(k-1)]`` ::

    x(k|k)   = L Cy x(k) + (I - L Cy_a) x(k|k-1)           =: Mx x + Mp x(k|k-1)
    u(k)     = -K x(k|k) + (I - Ku) u(k-1),    K = Kh (Fx_aug - (1 (x) I_p) Z_d S_d) [- Kt0 U_d S_d]
    x(k+1)   = A x(k) + B u(k)
    x(k+1|k) = A_aug x(k|k) + B_aug u(k)

(``Cy`` the measured outputs the estimator reads, ``Cy_a = [Cy, Cd]``; a measured feed-through
``Dy u(k)`` is subtracted before the filter reads them, so it leaves the loop alone; ``S_d``
picks the disturbance estimate; setpoint at zero; the bracket with input targets,
``Ku`` then including ``Kt0``, :mod:`service.solver.design.input_target`).  With the Riccati
terminal weight ``K`` also holds ``Kt (Phi_a - X_d S_d)`` and ``Ku`` the design's ``Kt Phi_u``
(:class:`TerminalTerm`).  In the coordinates ``[x; e; u]``
with ``e = [x; 0] - x(k|k-1)`` the matrix is block triangular, so its eigenvalues are those of
the controller loop and of ``(I - L Cy) A_aug`` together: the separation principle (common
practice).  :func:`whole_loop` forms the matrix in the original coordinates and checks the
union numerically instead of assuming it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.linalg
import scipy.optimize
from numpy.typing import NDArray

from service.solver.design.closed_loop import closed_loop_matrix
from service.solver.design.controller import ControllerDesign
from service.solver.design.feedforward import measured_target
from service.solver.design.marginal import MARGINAL_TOLERANCE
from service.solver.design.prediction import prediction_matrices
from service.solver.design.terminal import terminal_free_disturbance, terminal_prediction
from service.solver.estimation.estimator import Estimator
from service.solver.estimation.target import TargetProblem, target_problem
from service.solver.numerics import eigenvalues_by_modulus

__all__ = [
    "SEPARATION_TOLERANCE",
    "ControlLoop",
    "TerminalTerm",
    "TrueLoop",
    "WholeLoop",
    "control_loop",
    "estimator_target",
    "separation_check",
    "terminal_term",
    "true_loop",
    "whole_loop",
]

#: Largest distance, relative to ``max(1, spectral radius)``, between a whole-loop pole and its
#: partner in the union of controller and estimator poles for the separation check to pass.
#: Loose enough for the ``eps^(1/k)`` spread of a defective eigenvalue of multiplicity ``k <= 3``
#: (common practice of eigenvalue perturbation).
SEPARATION_TOLERANCE = 1e-5
#: The separation check compares the power sums of the poles up to this power.
_POWER_SUMS = 6


def separation_check(
    whole: NDArray[np.complex128], union: NDArray[np.complex128], matrix_norm: float, radius: float
) -> bool:
    """Whether the whole loop's poles are the union of the parts' poles, up to rounding.

    Parameters
    ----------
    whole : ndarray of complex, shape (N,)
        Poles of the whole loop.
    union : ndarray of complex, shape (N,)
        The controller's and the estimator's poles together.
    matrix_norm : float
        1-norm of the whole-loop matrix.
    radius : float
        Spectral radius of the whole loop.

    Returns
    -------
    bool
        As many poles in both, and the power sums ``s_j = sum z^j``, ``j = 1..``
        :data:`_POWER_SUMS`, agree within ``j SEPARATION_TOLERANCE max(1, sum |z|^j)``.

    Notes
    -----
    A defective eigenvalue of multiplicity ``k`` (the chain of poles at 0 of a dead time is
    one) scatters under rounding on a circle of radius about ``(eps ||M||)^(1/k)`` (Wilkinson's
    perturbation bound for a Jordan block, standard numerical linear algebra), differently
    in the whole loop and in its parts: with 20 delays that is about 0.2, so single poles
    cannot be paired there.  The power sums are ``trace(M^j)`` on each side; the scattered
    copies of a block at ``z0`` are ``z0`` plus the ``k``-th roots of a tiny number, whose
    powers below ``k`` sum to ``k z0^j`` plus rounding, so the sums keep the sensitivity of
    a simple eigenvalue (Newton's identities tie them to the characteristic polynomial).
    A pole of the whole loop that moved by ``delta`` changes ``s_1`` by ``delta``.
    """
    if whole.size != union.size:
        return False
    scale = max(matrix_norm, 1.0)
    eps = float(np.finfo(float).eps)
    for j in range(1, _POWER_SUMS + 1):
        mine, theirs = np.sum(whole**j), np.sum(union**j)
        size = max(1.0, float(np.sum(np.abs(union) ** j)))
        rounding = whole.size * eps * scale**j
        if abs(mine - theirs) > j * SEPARATION_TOLERANCE * max(1.0, radius) ** j * size + rounding:
            return False
    return True


@dataclass(frozen=True)
class TerminalTerm:
    """The Riccati terminal term of the move law on the estimate (:mod:`service.solver.design.terminal`).

    The design penalizes ``|xi(k+Hp) - xi_s|^2_P`` with ``xi = [x; u(k-1)]`` (plant states and
    last input).  On the estimate the free terminal prediction (no moves) is ::

        xi_free(k+Hp) = Phi_a x(k|k) + Phi_u u(k-1)

    (the kept rows of ``A_aug,i^Hp``: the disturbance estimate is carried forward as a constant,
    as in ``Fx_aug``), and the steady-state target of the same step is ``xi_s = [x_s; u_s] =
    X_r r + X_d d(k|k)``, the offset-free target of :mod:`service.solver.estimation.target`
    (``X_r``, ``X_d`` its ``setpoint_map`` and ``disturbance_map``, plant states and inputs).
    Minimizing ``|G dU - E|^2_Q + |dU|^2_R + |Gamma dU - (xi_s - xi_free)|^2_P`` gives the
    gradient ``G'Q E + Gamma' P e_t`` with the *terminal error* ``e_t = xi_s - xi_free(k+Hp)``,
    so the first move is ::

        du(k) = Kh E + Kt e_t,        Kt = first m rows of H^-1 Gamma' P

    (the design's ``terminal_gain``).  Both ``E`` and ``e_t`` are linear in ``(x(k|k), u(k-1),
    r)``, so the law stays a fixed linear law: ``K += Kt (Phi_a - X_d S_d)``, ``Ku += Kt Phi_u``,
    ``Kr += Kt X_r``.

    Attributes
    ----------
    gain : ndarray, shape (m, n+m)
        ``Kt``.
    free_state : ndarray, shape (n+m, na)
        ``Phi_a``.
    free_input : ndarray, shape (n+m, m)
        ``Phi_u``.
    setpoint_map : ndarray, shape (n+m, p)
        ``X_r``.
    disturbance_map : ndarray, shape (n+m, nd)
        ``X_d``.
    free_measured : ndarray, shape (n+m, md)
        ``Phi_m``: how held measured disturbances move ``xi_free(k+Hp)`` (no columns without).
    measured_map : ndarray, shape (n+m, md)
        ``X_m``: how they move ``xi_s`` (the disturbance map of
        :func:`service.solver.design.feedforward.measured_target`).
        With measured disturbances ``e_t`` gains ``(X_m - Phi_m) d_m``.
    input_target_map : ndarray, shape (n+m, m), or None
        ``X_t``: with input targets ``xi_s`` gains ``X_t u_t`` (``None`` without an input weight).
    """

    gain: NDArray[np.float64]
    free_state: NDArray[np.float64]
    free_input: NDArray[np.float64]
    setpoint_map: NDArray[np.float64]
    disturbance_map: NDArray[np.float64]
    free_measured: NDArray[np.float64] | None = None
    measured_map: NDArray[np.float64] | None = None
    input_target_map: NDArray[np.float64] | None = None

    @property
    def feedforward_shift(self) -> NDArray[np.float64]:
        """``X_m - Phi_m``, shape (n+m, md): what held measured disturbances add to ``e_t``."""
        if self.free_measured is None or self.measured_map is None:
            return np.zeros((self.free_state.shape[0], 0))
        return self.measured_map - self.free_measured

    @property
    def feedforward(self) -> NDArray[np.float64]:
        """``Kt (Phi_m - X_m)``, shape (m, md): the terminal part of the feed-forward gain ``Kd``."""
        if self.free_measured is None or self.measured_map is None:
            return np.zeros((self.gain.shape[0], 0))
        return self.gain @ (self.free_measured - self.measured_map)

    def free_prediction(
        self, estimate: NDArray[np.float64], previous_input: NDArray[np.float64]
    ) -> NDArray[np.float64]:
        """Return ``xi_free(k+Hp) = Phi_a x(k|k) + Phi_u u(k-1)``, shape (n+m,)."""
        return self.free_state @ estimate + self.free_input @ previous_input


def terminal_term(
    design: ControllerDesign,
    estimator: Estimator,
    target: TargetProblem,
    *,
    b_disturbance: NDArray[np.float64] | None = None,
    measured: TargetProblem | None = None,
) -> TerminalTerm | None:
    """Return the terminal term of a design with the Riccati terminal weight (else ``None``).

    Parameters
    ----------
    design : ControllerDesign
    estimator : Estimator
        Of the same model.
    target : TargetProblem
        :func:`estimator_target` of both.
    b_disturbance : ndarray, shape (n, md), optional
        ``Bd`` of the measured disturbances (design signals): fills ``free_measured`` and
        ``measured_map``.
    measured : TargetProblem, optional
        :func:`service.solver.design.feedforward.measured_target` of ``b_disturbance``, when
        the caller has it already (formed here otherwise).

    Returns
    -------
    TerminalTerm or None
    """
    if design.terminal is None or design.terminal_gain is None:
        return None
    pred = design.prediction
    n, na = estimator.state_size, estimator.augmented_size
    phi, _ = terminal_prediction(
        estimator.a, estimator.b, prediction=pred.prediction, control=pred.control, states=n
    )  # (n+m, na+m)
    free_measured = measured_map = None
    if b_disturbance is not None and b_disturbance.shape[1]:
        free_measured = terminal_free_disturbance(
            estimator.model_a, b_disturbance, inputs=estimator.model_b.shape[1], prediction=pred.prediction
        )
        if measured is None:
            measured = measured_target(estimator.model_a, estimator.model_b, estimator.model_c, b_disturbance, design)
        measured_map = measured.disturbance_map
    return TerminalTerm(
        gain=design.terminal_gain,
        free_state=phi[:, :na],
        free_input=phi[:, na:],
        setpoint_map=target.setpoint_map,
        disturbance_map=target.disturbance_map,
        free_measured=free_measured,
        measured_map=measured_map,
        input_target_map=None if design.input_weight is None else target.input_target_map,
    )


@dataclass(frozen=True)
class ControlLoop:
    """Everything the running controller needs, formed once.

    Attributes
    ----------
    design : ControllerDesign
    estimator : Estimator
    target : TargetProblem
        Target equations of the model, its disturbance layout and the design's ``Q``.
    free_state : ndarray, shape (Np*p, na)
        ``Fx_aug``.
    free_input : ndarray, shape (Np*p, m)
        ``Fu``.
    horizon_gain : ndarray, shape (m, Np*p)
        ``Kh``.
    penalized_steps : int
        ``Np``.
    terminal : TerminalTerm or None
        The Riccati terminal term, when the design has one: the move is then
        ``Kh E + Kt e_t``.
    """

    design: ControllerDesign
    estimator: Estimator
    target: TargetProblem
    free_state: NDArray[np.float64]
    free_input: NDArray[np.float64]
    horizon_gain: NDArray[np.float64]
    penalized_steps: int
    terminal: TerminalTerm | None = None

    def free_prediction(
        self, estimate: NDArray[np.float64], previous_input: NDArray[np.float64]
    ) -> NDArray[np.float64]:
        """Return ``Fx_aug x(k|k) + Fu u(k-1)``, shape (Np*p,)."""
        return self.free_state @ estimate + self.free_input @ previous_input


def estimator_target(design: ControllerDesign, estimator: Estimator) -> TargetProblem:
    """The offset-free target equations of the estimator's model, weighted by the design's ``Q``."""
    return target_problem(
        estimator.model_a,
        estimator.model_b,
        estimator.model_c,
        disturbance_input=estimator.disturbance_input,
        disturbance_output=estimator.disturbance_controlled,
        output_weight=design.output_weight,
        input_weight=design.input_weight,
    )


def control_loop(design: ControllerDesign, estimator: Estimator) -> ControlLoop:
    """Join a design and an estimator of the same model.

    Parameters
    ----------
    design : ControllerDesign
    estimator : Estimator
        Designed on the same ``(A, B, C)`` as ``design``.

    Returns
    -------
    ControlLoop

    Raises
    ------
    ValueError
        When the estimator's model does not reproduce the design's prediction matrices (a
        programming error: both must come from the same model).
    """
    pred = design.prediction
    aug = prediction_matrices(
        estimator.a,
        estimator.b,
        estimator.c_controlled,
        prediction=pred.prediction,
        control=pred.control,
        first_penalized=pred.first_penalized,
    )
    n = estimator.state_size
    scale = max(1.0, float(np.abs(pred.free_state).max(initial=0.0)), float(np.abs(pred.free_input).max(initial=0.0)))
    if (
        aug.free_input.shape != pred.free_input.shape
        or aug.free_state.shape[0] != pred.free_state.shape[0]
        or not np.allclose(aug.free_input, pred.free_input, rtol=0.0, atol=1e-10 * scale)
        or not np.allclose(aug.free_state[:, :n], pred.free_state, rtol=0.0, atol=1e-10 * scale)
    ):
        raise ValueError("the estimator's model is not the model of the design")
    target = estimator_target(design, estimator)
    return ControlLoop(
        design=design,
        estimator=estimator,
        target=target,
        free_state=aug.free_state,
        free_input=pred.free_input,
        horizon_gain=design.gain.horizon,
        penalized_steps=pred.penalized_steps,
        terminal=terminal_term(design, estimator, target),
    )


@dataclass(frozen=True)
class WholeLoop:
    """Poles of plant, controller and estimator together, and the separation check.

    Attributes
    ----------
    matrix : ndarray, shape (n+na+m, n+na+m)
        On ``[x(k); x(k|k-1); u(k-1)]``; for ``full_state`` the controller loop on
        ``[x(k); u(k-1)]`` (no estimator states).
    poles : ndarray of complex
        Eigenvalues of ``matrix``, by descending modulus.
    controller_poles : ndarray of complex, shape (n+m,)
        The design's closed-loop poles.
    estimator_poles : ndarray of complex, shape (na,)
        ``eig((I - L Cy) A_aug)``; empty for ``full_state``.
    separation_error : float
        Largest distance between a whole-loop pole and its partner in the union of
        controller and estimator poles (optimal one-to-one matching).
    separation_holds : bool
        :func:`separation_check`: the power sums of both sets of poles agree (insensitive
        to the rounding scatter of repeated poles, such as the poles at 0 of dead times).
    spectral_radius : float
    stable : bool
        ``spectral_radius < 1 - MARGINAL_TOLERANCE`` and no marginal mode in the controller's
        loop (:mod:`service.solver.design.marginal`; the estimator's poles are strictly stable).
    """

    matrix: NDArray[np.float64]
    poles: NDArray[np.complex128]
    controller_poles: NDArray[np.complex128]
    estimator_poles: NDArray[np.complex128]
    separation_error: float
    separation_holds: bool
    spectral_radius: float
    stable: bool

    @property
    def unstable(self) -> bool:
        """Some pole lies outside the unit circle by more than ``MARGINAL_TOLERANCE``."""
        return self.spectral_radius > 1.0 + MARGINAL_TOLERANCE


def _whole_loop_matrix(
    loop: ControlLoop,
    plant: tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]] | None = None,
    feedthrough: NDArray[np.float64] | None = None,
) -> NDArray[np.float64]:
    est = loop.estimator
    design = loop.design
    if est.full_state and plant is None:
        return design.loop.matrix
    if est.full_state:
        assert plant is not None
        return closed_loop_matrix(plant[0], plant[1], design.gain.state, design.gain.previous_input)
    na = est.augmented_size
    m = est.b.shape[1]
    if plant is None:
        a, b, c = est.model_a, est.model_b, est.c_measured[:, : est.state_size]
    else:
        a, b, c = plant
    n = a.shape[0]
    mx = est.gain @ c  # (na, n): the estimator reads the plant's measured outputs
    mp = np.eye(na) - est.gain @ est.c_measured  # (na, na)
    select = np.zeros((est.disturbance_size, na))
    select[:, est.disturbance_slice] = np.eye(est.disturbance_size)
    corrected = np.tile(loop.target.output_disturbance_map @ select, (loop.penalized_steps, 1))
    k = loop.horizon_gain @ (loop.free_state - corrected)  # (m, na)
    if design.input_target_gain is not None:  # u_s = ... + U_d d: the input penalty's part
        k = k - design.input_target_gain @ loop.target.disturbance_map[est.state_size :] @ select
    if loop.terminal is not None:  # Kt (xi_s - Phi xi): Kt (Phi_a - X_d S_d); Kt Phi_u is in Ku
        k = k + loop.terminal.gain @ (loop.terminal.free_state - loop.terminal.disturbance_map @ select)
    hold = np.eye(m) - design.gain.previous_input
    u_row = np.hstack([-k @ mx, -k @ mp, hold])  # u(k) in terms of [x; x(k|k-1); u(k-1)]
    xf_row = np.hstack([mx, mp, np.zeros((na, m))])  # x(k|k)
    if feedthrough is not None and plant is not None:
        # the true sensors' feed-through D_t u(k) less the D_m u(k) the estimator subtracts:
        # x(k|k) gains L (D_t - D_m) u(k), so (I + K L (D_t - D_m)) u(k) = the row above
        excess = est.gain @ (np.asarray(feedthrough, dtype=float) - est.feedthrough)  # (na, m)
        if np.any(excess):
            u_row = np.asarray(np.linalg.solve(np.eye(m) + k @ excess, u_row), dtype=np.float64)
            xf_row = xf_row + excess @ u_row
    x_row = np.hstack([a, np.zeros((n, na)), np.zeros((n, m))]) + b @ u_row
    xp_row = est.a @ xf_row + est.b @ u_row
    return np.vstack([x_row, xp_row, u_row])


@dataclass(frozen=True)
class TrueLoop:
    """The loop of controller and estimator (designed on the model) running on another plant.

    Attributes
    ----------
    matrix : ndarray, shape (nt+na+m, nt+na+m)
        On ``[x_true(k); x(k|k-1); u(k-1)]`` (``[x_true; u(k-1)]`` for ``full_state``).
    poles : ndarray of complex
        By descending modulus.
    spectral_radius : float
    stable : bool
        ``spectral_radius < 1 - MARGINAL_TOLERANCE``.
    unstable : bool
        ``spectral_radius > 1 + MARGINAL_TOLERANCE``.
    """

    matrix: NDArray[np.float64]
    poles: NDArray[np.complex128]
    spectral_radius: float
    stable: bool
    unstable: bool


def true_loop(
    loop: ControlLoop,
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    d: NDArray[np.float64] | None = None,
) -> TrueLoop:
    """Return the poles of the loop on a true plant ``(A_t, B_t, C_t, D_t)`` (setpoint at zero).

    The same equations as :func:`whole_loop` with the true plant in place of the model:
    ``x(k|k) = L C_t x_t(k) + (I - L Cy) x(k|k-1)``, ``u(k) = -K x(k|k) + (I - Ku) u(k-1)``,
    ``x_t(k+1) = A_t x_t(k) + B_t u(k)``.  With the true plant equal to the model they are
    the whole loop's poles.

    Parameters
    ----------
    loop : ControlLoop
    a : ndarray, shape (nt, nt)
    b : ndarray, shape (nt, m)
    c : ndarray, shape (py, nt)
        The true plant's measured outputs, what the estimator reads (its controlled outputs
        when the model has no measured outputs of its own), in the signals of the loop (scaled
        like the model); ``nt = n`` for ``full_state``.
    d : ndarray, shape (py, m), optional
        The true sensors' feed-through ``D_t``; default: the model's ``D_m``, which the
        estimator's subtraction of ``D_m u(k)`` cancels.  Another one leaves
        ``(D_t - D_m) u(k)`` in what the estimator reads, and the command solves
        ``(I + K L (D_t - D_m)) u(k) = ...`` (substitution; ``numpy.linalg.LinAlgError`` when
        that matrix is singular).  Ignored for ``full_state``.

    Returns
    -------
    TrueLoop
    """
    matrix = _whole_loop_matrix(loop, (a, b, c), d)
    poles = eigenvalues_by_modulus(matrix)
    radius = float(np.abs(poles).max(initial=0.0))
    return TrueLoop(
        matrix=matrix,
        poles=poles,
        spectral_radius=radius,
        stable=radius < 1.0 - MARGINAL_TOLERANCE,
        unstable=radius > 1.0 + MARGINAL_TOLERANCE,
    )


def whole_loop(loop: ControlLoop) -> WholeLoop:
    """Return the whole loop's poles and check them against the separation principle.

    Parameters
    ----------
    loop : ControlLoop

    Returns
    -------
    WholeLoop

    Notes
    -----
    The matching pairs each whole-loop pole with one pole of the union so that the largest
    distance is small (``scipy.optimize.linear_sum_assignment`` on the distance matrix, then
    the largest matched distance).
    """
    matrix = _whole_loop_matrix(loop)
    poles = eigenvalues_by_modulus(matrix)
    controller = loop.design.loop.poles
    estimator = loop.estimator.poles
    union = np.concatenate([controller, estimator])
    radius = float(np.abs(poles).max(initial=0.0))
    if union.size != poles.size:  # pragma: no cover - sizes agree by construction
        error, holds = float("inf"), False
    else:
        distance = np.abs(poles[:, None] - union[None, :])
        rows, cols = scipy.optimize.linear_sum_assignment(distance)
        error = float(distance[rows, cols].max(initial=0.0))
        norm = float(np.linalg.norm(matrix, 1)) if matrix.size else 0.0
        holds = separation_check(poles, union, norm, radius)
    return WholeLoop(
        matrix=matrix,
        poles=poles,
        controller_poles=controller,
        estimator_poles=estimator,
        separation_error=error,
        separation_holds=holds,
        spectral_radius=radius,
        stable=radius < 1.0 - MARGINAL_TOLERANCE and not loop.design.loop.marginal,
    )
