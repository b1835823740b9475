"""The Riccati terminal weight: the infinite-horizon cost to go on the last predicted [x; u].

The incremental ("velocity") form of the plant, on ``xi(k) = [x(k); u(k-1)]`` with the move
``du(k)`` as its input, is ::

    xi(k+1) = A_i xi(k) + B_i du(k),    A_i = [[A, B], [0, I]],   B_i = [B; I],
    z(k)    = C_i xi(k),                C_i = [C, 0]

and the stage cost of the design notes is ``|C_i xi|^2_Q + |du|^2_R``.  The stabilizing
solution ``P`` of the discrete algebraic Riccati equation ::

    P = A_i' P A_i - A_i' P B_i (R + B_i' P B_i)^-1 B_i' P A_i + C_i' Q C_i

is the optimal cost of the infinite-horizon problem from ``xi``: ``V(xi) = xi' P xi``.  With
the terminal option the last penalized step ``Hp`` carries ``|xi(k+Hp) - xi_s|^2_P`` instead
of its output weight ``|z(k+Hp) - r|^2_Q`` (``P`` already contains ``C_i' Q C_i``).  By
dynamic programming (Bellman's principle of optimality) the horizon cost is then the
infinite-horizon cost, so with ``Hu = Hp`` and ``Hw = 1`` the first move equals the
infinite-horizon LQR move ``du = -K xi``, ``K = (R + B_i' P B_i)^-1 B_i' P A_i``, for every
horizon, ``Hp = 1`` included, and the loop is stable whenever the stabilizing solution
exists (standard results of linear-quadratic regulation; common practice).  The stage cost
at ``i = 0`` the horizon cost omits is a constant and does not change the minimiser.
With ``Hw > 1`` the stage costs of steps ``1 .. Hw-1`` are missing as well; they depend on
the moves, so the first move is no longer the LQR move and the Lyapunov argument for
stability does not apply (the closed loop's poles say whether it is stable).

Steady-state target.  For a constant setpoint ``r`` the terminal deviation is taken from
the steady state ``xi_s = [x_s; u_s] = S_r r`` of :mod:`service.solver.estimation.target` (exact when
the setpoint is reachable; the ``Q``-weighted least-squares compromise otherwise).  Every
steady state with ``z = r`` gives the same terminal cost: two of them differ by an
equilibrium of ``A_i`` with zero output, a direction in the null space of ``P``.

The terminal prediction.  With ``du(k+j) = 0`` for ``j >= Hu`` ::

    xi(k+Hp) = Phi xi(k) + Gamma dU,      Phi = A_i^Hp,    Gamma_j = A_i^(Hp-1-j) B_i

formed by the recursion ``M_l = A_i M_(l-1)`` (no matrix power).  The terminal term adds ::

    H += Gamma' P Gamma,        G'Q E  +=  Gamma' P (xi_s - Phi xi(k))

to the Hessian and the gradient of the design notes, i.e. ``n + m`` extra rows
``W_P Gamma`` (``W_P' W_P = P``) under the weighted step-response matrix.  The first-move
law becomes ::

    du(k) = Kh E + Kt (xi_s - Phi xi(k)),     Kt = first m rows of H^-1 Gamma' P

so ``Kx = Kh Fx + Kt Phi_x``, ``Ku = Kh Fu + Kt Phi_u`` and ``Kr = Kh (1 (x) I) + Kt S_r``
(``Phi = [Phi_x, Phi_u]``).  ``Kh`` keeps the last stage's columns at zero.

Input targets.  With an input weight ``S`` on ``u - u_s`` (:mod:`service.solver.design.input_target`,
spare inputs steered to their targets) the stage cost gains ``|u(k+l) - u_s|^2_S`` with
``u(k+l) = E_u xi(k+l) + du(k+l)``, ``E_u = [0, I_m]``: in deviations from the target a cost
with a cross term, ::

    |C_i xi|^2_Q + |du|^2_R + |E_u xi + du|^2_S
        = xi' (C_i' Q C_i + E_u' S E_u) xi + 2 xi' E_u' S du + du' (R + S) du

whose Riccati equation is the one above with ``Q_i = C_i'QC_i + E_u'SE_u``, ``R + S`` for
``R`` and the cross weight ``N = E_u' S`` (``scipy.linalg.solve_discrete_are(..., s=N)``), and
``K = (R + S + B_i' P B_i)^-1 (B_i' P A_i + N')`` (the LQ problem with a cross term in the
forms of scipy's ``solve_discrete_are`` and python-control's ``dlqr`` documentation).
A spare input combination that no output sees at steady state is seen by ``S``, so the
stabilizing solution exists where it did not without input targets.  The horizon's
input-target term covers ``u(k) .. u(k+Hu-1)``, so with ``Hu = Hp`` (and ``Hw = 1``) horizon
cost plus ``|xi(k+Hp) - xi_s|^2_P`` is again the infinite-horizon cost, and the first move the
LQR move on ``xi - xi_s``.  The steady state is the target's with the same ``S``: ``xi_s =
S_r r + S_t u_t`` (``S_t`` the target's ``input_target_map``), so the law's input-target gain
gains ``Kt S_t``.

Measured disturbances.  A measured disturbance ``d_m`` held over the horizon enters both sides
of the terminal deviation: the free terminal prediction gains ``Phi_m d_m`` with ``Phi_m =
[sum_{l<Hp} A^l Bd; 0]``, and the steady state under it moves by ``S_m d_m`` (the target
equations with ``Bd d_m`` on their right-hand side, :mod:`service.solver.estimation.target`).
So the feed-forward gain ``Kd = Kh Fd`` of :mod:`service.solver.design.feedforward` gains the
terminal part ``Kt (Phi_m - S_m)`` (:func:`terminal_free_disturbance` for ``Phi_m``,
:func:`service.solver.design.feedforward.measured_target` for ``S_m``): ``du = ... - Kd d_m``.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import scipy.linalg
from numpy.typing import NDArray

from service.errors import NumericalError
from service.solver.design.gain import FactoredHessian, PredictiveGain
from service.solver.design.marginal import MARGINAL_TOLERANCE
from service.solver.design.weights import weight_root
from service.solver.estimation.target import target_problem
from service.solver.numerics import balance_states, format_complex, in_scaled_states, pbh_matrix, singular_value_rank

__all__ = [
    "TERMINAL_FIELD",
    "TerminalKind",
    "TerminalWeight",
    "incremental_system",
    "riccati_terminal_weight",
    "terminal_first_move_gain",
    "terminal_free_disturbance",
    "terminal_gradient",
    "terminal_prediction",
    "terminal_weight",
    "with_terminal_gain",
]

TerminalKind = Literal["none", "riccati"]

#: The key of the request field a Riccati failure names.
TERMINAL_FIELD = ("weights", "terminal")
#: A closed loop ``A_i - B_i K`` with a pole this close to the unit circle (or outside) is not
#: the stabilizing solution: the service's own rule for a marginal pole.  Where no stabilizing
#: solution exists the solver can return the limit of near-stabilizing ones, whose loop keeps
#: the unseen mode at ``1 - O(sqrt(eps))`` (a pair of eigenvalues on the circle of the Riccati
#: equation's symplectic pencil splits by the square root of the rounding, first-order
#: perturbation of a Jordan block); 1 - 2e-8 was seen with two inputs alike and an input
#: weight on their sum only, which 1e-8 had let through.
_STABILIZING_MARGIN = MARGINAL_TOLERANCE
#: Largest relative residual of the Riccati equation accepted from the solver: ``scipy`` can
#: return a matrix that does not solve the equation when the problem has no stabilizing
#: solution, without raising (common practice: put the answer back into the equation).
_RESIDUAL = 1e-8


@dataclass(frozen=True)
class TerminalWeight:
    """The Riccati terminal weight of one design and its prediction.

    Attributes
    ----------
    matrix : ndarray, shape (n+m, n+m)
        ``P``, the stabilizing solution of the incremental Riccati equation (symmetric).
    root : ndarray, shape (n+m, n+m)
        ``W_P`` with ``W_P' W_P = P``.
    lqr_gain : ndarray, shape (m, n+m)
        ``K = (R + B_i' P B_i)^-1 B_i' P A_i``, the infinite-horizon move law ``du = -K xi``.
    free_response : ndarray, shape (n+m, n+m)
        ``Phi = A_i^Hp``: ``xi(k+Hp)`` from ``xi(k) = [x(k); u(k-1)]`` with no moves.
    moves : ndarray, shape (n+m, Hu*m) or (n+m, nb*m)
        ``Gamma``: ``xi(k+Hp)`` from the moves (only the free moves' columns with blocking).
    target : ndarray, shape (n+m, p)
        ``S_r``: the steady state ``xi_s = S_r r`` for a constant setpoint.
    input_target : ndarray, shape (n+m, m), or None
        ``S_t``: with input targets ``xi_s = S_r r + S_t u_t``; ``None`` without an input weight.
    """

    matrix: NDArray[np.float64]
    root: NDArray[np.float64]
    lqr_gain: NDArray[np.float64]
    free_response: NDArray[np.float64]
    moves: NDArray[np.float64]
    target: NDArray[np.float64]
    input_target: NDArray[np.float64] | None = None

    @property
    def weighted_moves(self) -> NDArray[np.float64]:
        """``W_P Gamma``, the rows the terminal term adds under ``Wbar G``; shape (n+m, cols)."""
        return self.root @ self.moves


def incremental_system(
    a: NDArray[np.float64], b: NDArray[np.float64], c: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Return ``(A_i, B_i, C_i)`` of the incremental system on ``[x; u(k-1)]``.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)

    Returns
    -------
    a_i : ndarray, shape (n+m, n+m)
        ``[[A, B], [0, I]]``.
    b_i : ndarray, shape (n+m, m)
        ``[B; I]``.
    c_i : ndarray, shape (p, n+m)
        ``[C, 0]``.
    """
    n, m = b.shape
    a_i = np.block([[a, b], [np.zeros((m, n)), np.eye(m)]])
    b_i = np.vstack([b, np.eye(m)])
    c_i = np.hstack([c, np.zeros((c.shape[0], m))])
    return a_i, b_i, c_i


def _rank_drop(matrix: NDArray[Any]) -> bool:
    """Whether a tall or wide PBH matrix has lost rank (relative tolerance 1e-9, common practice)."""
    s = np.linalg.svd(matrix, compute_uv=False)
    return s.size == 0 or singular_value_rank(s, 1e-9) < s.size


def _why_no_stabilizing_solution(
    a_i: NDArray[np.float64],
    b_i: NDArray[np.float64],
    seen: NDArray[np.float64],
    *,
    input_targets: bool = False,
    slow_loop: float | None = None,
) -> tuple[str, str, bool]:
    """Name the mode that spoils the Riccati equation (PBH tests on the unit circle and outside), and the way out.

    ``seen`` stacks the rows of the stage cost that see ``[x; u]``: ``W C_i`` and, with input
    targets (``input_targets``), ``W_S E_u``.  The last item says whether the stabilizing solution
    exists all the same (a stable mode no weighted signal sees, within the marginal band, which
    the loop keeps where it is).
    """
    inputs = b_i.shape[1]
    for z in scipy.linalg.eigvals(a_i, check_finite=False):
        if abs(z) < 1.0 - _STABILIZING_MARGIN:  # a mode this near the circle counts as on it (marginal rule)
            continue
        where = f"z = {format_complex(z)}"
        if _rank_drop(pbh_matrix(a_i, z, inputs=b_i)):
            return (
                f"the mode of [x; u] at {where} cannot be moved by the inputs (the incremental "
                f"system is not stabilizable)",
                'Use terminal "none", or check the model: no move reaches that mode',
                False,
            )
        if abs(abs(z) - 1.0) <= _STABILIZING_MARGIN and _rank_drop(pbh_matrix(a_i, z, outputs=seen)):
            if abs(z) < 1.0 - 1e-9:
                # a stable mode that no weighted signal sees: the stabilizing solution exists, but
                # its loop keeps the mode where it is, within the marginal band
                return (
                    f"the mode of [x; u] at modulus 1 - {1.0 - abs(z):.3g}, within {_STABILIZING_MARGIN:g} "
                    f"of the unit circle, changes no weighted controlled output{' and no weighted input' if input_targets else ''}, "
                    "so the terminal weight's loop keeps it there, which the service counts as marginal "
                    "rather than stable",
                    'Weight an output that sees this mode, or use terminal "none" (its loop keeps the mode '
                    "as well, and closed_loop.marginal_modes names it)",
                    True,
                )
            spare = inputs > int(np.linalg.matrix_rank(seen)) if seen.size else True
            return (
                f"the mode of [x; u] at {where}, on the unit circle, changes no weighted "
                f"controlled output{' and no weighted input' if input_targets else ''} (with more manipulated variables than weighted controlled "
                f"outputs, or a plant zero at z = 1, some input combination leaves every "
                f"output unchanged at steady state)",
                (
                    "Give that input combination an input target (a positive input weight on it, "
                    'weights.input), weight an output that sees this mode, or use terminal "none"'
                    if spare and not input_targets
                    else "Weight an output that sees this mode, give the input combination that leaves every "
                    'output unchanged a positive input weight (weights.input), or use terminal "none"'
                ),
                False,
            )
    if slow_loop is not None:
        # every mode on or near the circle is reached and seen, and the solver's answer solves the
        # equation with a loop inside the circle: a genuine stabilizing solution, only slow (a
        # direction the stage cost sees faintly: on a spare input combination the pole is about
        # 1 - sqrt(S/R), LQ theory for the scalar problem)
        return (
            f"its loop's slowest pole, at modulus 1 - {1.0 - slow_loop:.3g}, is within {_STABILIZING_MARGIN:g} of "
            "the unit circle, which the service counts as marginal rather than stable: some direction is "
            "weighted far more lightly than the moves that steer it (an input weight many orders of magnitude "
            "below the move weights, or a faint output weight)",
            "Raise the weight on that direction (weights.input for a spare input combination, weights.output "
            'for an output) or lower its move weights, or use terminal "none"',
            True,
        )
    return (
        "the solver found no stabilizing solution",
        'Use terminal "none", weight an output that sees every slow mode, or give every move a positive move weight',
        False,
    )


def riccati_terminal_weight(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    output_weight: NDArray[np.float64],
    move_weight: NDArray[np.float64],
    input_weight: NDArray[np.float64] | None = None,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Return the stabilizing Riccati solution ``P`` and the LQR gain ``K`` of the incremental system.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
        Controlled outputs.
    output_weight : ndarray, shape (p, p)
        ``Q``.
    move_weight : ndarray, shape (m, m)
        ``R``.
    input_weight : ndarray, shape (m, m), optional
        ``S`` of the input targets: the stage cost gains ``|E_u xi + du|^2_S`` (module notes).

    Returns
    -------
    p : ndarray, shape (n+m, n+m)
        Symmetric stabilizing solution (``scipy.linalg.solve_discrete_are``).
    k : ndarray, shape (m, n+m)
        ``(R + B_i' P B_i)^-1 B_i' P A_i`` (with ``S``: ``(R + S + B_i' P B_i)^-1 (B_i' P A_i +
        N')``), by a Cholesky solve.

    Raises
    ------
    service.errors.NumericalError
        Pointer ``/weights/terminal``, when the equation has no stabilizing solution: a mode
        of ``[x; u]`` on or outside the unit circle that the moves cannot reach, or one on the
        unit circle that no weighted output sees (e.g. more inputs than controlled outputs),
        or ``R + B_i' P B_i`` singular.  ``scipy`` can return a non-stabilizing matrix, or
        one that does not solve the equation, in such cases without raising, so the
        residual and the closed loop ``A_i - B_i K`` are checked explicitly.
    """
    # Solved in units where every input and state has a moderate size (powers of two, so the
    # change of variables is exact): u = S v and x = D xi give the incremental state
    # [x; u] = T [xi; v] with T = diag(D, S), P = T^-T P_s T^-1 and K = S K_s T^-1.  In the
    # request's units an input scaled by 1e9 (its move weight by 1e18, the same problem) had
    # made the equation's checks and the PBH verdicts of its failure refuse it.
    t = _incremental_scales(a, b, c, move_weight if input_weight is None else move_weight + input_weight)
    n = a.shape[0]
    d, s = t[:n], t[n:]
    a_s, b_s, c_s = in_scaled_states(d, a, b * s, c)
    p_s, k_s = _riccati_solution(
        a_s,
        b_s,
        c_s,
        output_weight,
        move_weight * s[:, None] * s[None, :],
        None if input_weight is None else input_weight * s[:, None] * s[None, :],
    )
    return p_s / t[:, None] / t[None, :], s[:, None] * k_s / t[None, :]


def _incremental_scales(
    a: NDArray[np.float64], b: NDArray[np.float64], c: NDArray[np.float64], move_weight: NDArray[np.float64]
) -> NDArray[np.float64]:
    """The diagonal of ``T = diag(D, S)``, powers of two: ``[x; u] = T [xi; v]`` in moderate units.

    ``S`` makes each input's column of ``[B; R^(1/2)]`` about 1 in size (a change of the input's
    unit scales both alike), ``D`` balances the states of ``(A, B S, C)``
    (:func:`service.solver.numerics.balance_states`).
    """
    column = np.sqrt(np.einsum("ij,ij->j", b, b) + np.clip(np.diag(move_weight), 0.0, None))
    s = np.exp2(-np.round(np.log2(np.where(column > 0.0, column, 1.0))))
    return np.concatenate([balance_states(a, b * s, c), s])


def _riccati_solution(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    output_weight: NDArray[np.float64],
    move_weight: NDArray[np.float64],
    input_weight: NDArray[np.float64] | None = None,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """:func:`riccati_terminal_weight` in the units it is solved in (its checks, its failures)."""
    a_i, b_i, c_i = incremental_system(a, b, c)
    n, m = b.shape
    state_weight = c_i.T @ output_weight @ c_i
    seen = weight_root(output_weight) @ c_i
    stage_move = move_weight
    cross = np.zeros((n + m, m))
    if input_weight is not None:  # |E_u xi + du|^2_S (module notes)
        e_u = np.hstack([np.zeros((m, n)), np.eye(m)])
        state_weight = state_weight + e_u.T @ input_weight @ e_u
        cross = e_u.T @ input_weight
        stage_move = move_weight + input_weight
        seen = np.vstack([seen, weight_root(input_weight) @ e_u])
    failure = ""  # our own figures of a solution that is not the stabilizing one (the library's words stay out)
    slow_loop = None  # the spectral radius of a solution of the equation whose loop is inside the circle
    p = k = None
    try:
        with np.errstate(all="ignore"):
            p = scipy.linalg.solve_discrete_are(
                a_i, b_i, state_weight, stage_move, s=None if input_weight is None else cross
            )
        p = 0.5 * (p + p.T)
        lhs = stage_move + b_i.T @ p @ b_i
        k = scipy.linalg.cho_solve(scipy.linalg.cho_factor(0.5 * (lhs + lhs.T), lower=True), b_i.T @ p @ a_i + cross.T)
    except (np.linalg.LinAlgError, ValueError):
        p = k = None
    if p is not None and k is not None and np.all(np.isfinite(p)) and np.all(np.isfinite(k)):
        residual = a_i.T @ p @ a_i - (a_i.T @ p @ b_i + cross) @ k + state_weight - p
        scale = max(1.0, float(np.abs(p).max()), float(np.abs(state_weight).max()))
        radius = float(np.abs(scipy.linalg.eigvals(a_i - b_i @ k, check_finite=False)).max(initial=0.0))
        if radius < 1.0 - _STABILIZING_MARGIN and float(np.abs(residual).max()) <= _RESIDUAL * scale:
            return p, k
        if radius < 1.0 - 1e-9 and float(np.abs(residual).max()) <= _RESIDUAL * scale:
            slow_loop = radius
        failure = (
            f" (the solver's answer leaves the loop with spectral radius {radius:.9f} and a relative "
            f"residual of {float(np.abs(residual).max()) / scale:.3g})"
        )
    reason, advice, kept = _why_no_stabilizing_solution(
        a_i, b_i, seen, input_targets=input_weight is not None, slow_loop=slow_loop
    )
    header = (
        "The Riccati terminal weight does not give a stable loop: the Riccati equation of the incremental "
        "system has no solution whose loop is stable by the service's marginal rule because"
        if kept
        else "The Riccati terminal weight does not exist: the Riccati equation of the incremental "
        "system has no stabilizing solution because"
    )
    raise NumericalError(
        f"{header} {reason}{failure}. {advice}.",
        field=TERMINAL_FIELD,
    )


def terminal_prediction(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    *,
    prediction: int,
    control: int,
    states: int | None = None,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Return ``Phi`` and ``Gamma`` of ``[x(k+Hp); u(k+Hp-1)] = Phi [x(k); u(k-1)] + Gamma dU``.

    Parameters
    ----------
    a : ndarray, shape (na, na)
        State matrix of the model the controller predicts with (the plant, or the plant with
        disturbance states appended after the first ``states`` plant states).
    b : ndarray, shape (na, m)
    prediction : int
        ``Hp >= 1``.
    control : int
        ``1 <= Hu <= Hp``.
    states : int, optional
        How many leading states belong in the terminal ``x`` (default all ``na``).

    Returns
    -------
    free_response : ndarray, shape (states+m, na+m)
        ``Phi``: rows of ``A_i^Hp`` for the kept states and the inputs.
    moves : ndarray, shape (states+m, Hu*m)
        ``Gamma``, block ``j`` is the kept rows of ``A_i^(Hp-1-j) B_i``.

    Notes
    -----
    One recursion ``M_l = A_i M_(l-1)`` over ``l = 0..Hp`` on the incremental matrices of
    ``(a, b)`` gives both; no matrix power is formed.
    """
    hp, hu = prediction, control
    assert 1 <= hu <= hp, (hp, hu)
    na, m = b.shape
    kept = na if states is None else states
    a_i = np.block([[a, b], [np.zeros((m, na)), np.eye(m)]])
    b_i = np.vstack([b, np.eye(m)])
    rows = np.r_[np.arange(kept), na + np.arange(m)]
    moves = np.empty((kept + m, hu * m))
    power = np.eye(na + m)  # A_i^l
    for lag in range(hp):
        j = hp - 1 - lag  # the move that acts with A_i^lag B_i on xi(k+Hp)
        if j < hu:
            moves[:, j * m : (j + 1) * m] = (power @ b_i)[rows]
        power = a_i @ power
    return power[rows], moves


def terminal_weight(
    a: NDArray[np.float64],
    b: NDArray[np.float64],
    c: NDArray[np.float64],
    *,
    output_weight: NDArray[np.float64],
    move_weight: NDArray[np.float64],
    prediction: int,
    control: int,
    input_weight: NDArray[np.float64] | None = None,
) -> TerminalWeight:
    """Return the Riccati terminal weight with its prediction and steady-state target map.

    Parameters
    ----------
    a : ndarray, shape (n, n)
    b : ndarray, shape (n, m)
    c : ndarray, shape (p, n)
    output_weight : ndarray, shape (p, p)
        ``Q``.
    move_weight : ndarray, shape (m, m)
        ``R``.
    prediction, control : int
        ``Hp`` and ``Hu``.
    input_weight : ndarray, shape (m, m), optional
        ``S`` of the input targets (module notes): in the stage cost and in the target.

    Returns
    -------
    TerminalWeight

    Raises
    ------
    service.errors.NumericalError
        From :func:`riccati_terminal_weight`.
    """
    p, k = riccati_terminal_weight(a, b, c, output_weight, move_weight, input_weight)
    phi, gamma = terminal_prediction(a, b, prediction=prediction, control=control)
    target = target_problem(a, b, c, output_weight=output_weight, input_weight=input_weight)
    # the root in the units P was solved in (W_s' W_s = T P T, W = W_s T^-1): P's entries may
    # span the inputs' units squared, past what one eigendecomposition resolves
    t = _incremental_scales(a, b, c, move_weight if input_weight is None else move_weight + input_weight)
    root = weight_root(p * t[:, None] * t[None, :]) / t[None, :]
    return TerminalWeight(
        matrix=p,
        root=root,
        lqr_gain=k,
        free_response=phi,
        moves=gamma,
        target=target.setpoint_map,
        input_target=None if input_weight is None else target.input_target_map,
    )


def terminal_first_move_gain(hessian: FactoredHessian, terminal: TerminalWeight, *, inputs: int) -> NDArray[np.float64]:
    """Return ``Kt``, the first m rows of ``H^-1 Gamma' P``.

    Parameters
    ----------
    hessian : FactoredHessian
        The Hessian with the terminal term included.
    terminal : TerminalWeight
    inputs : int
        ``m``.

    Returns
    -------
    ndarray, shape (m, n+m)
        ``du(k) = Kh E + Kt (xi_s - Phi xi(k))``.

    Notes
    -----
    As in :func:`service.solver.design.gain.first_move_gain`: ``Y = H^-1 [I_m; 0]`` by two
    triangular solves, then ``Kt = Y' Gamma' P = (W_P Gamma Y)' W_P``.
    """
    selector = np.zeros((hessian.matrix.shape[0], inputs))
    selector[:inputs, :inputs] = np.eye(inputs)
    y = hessian.solve(selector)
    return (terminal.weighted_moves @ y).T @ terminal.root


def terminal_gradient(
    terminal: TerminalWeight, state: NDArray[np.float64], target: NDArray[np.float64]
) -> NDArray[np.float64]:
    """Return the terminal term of the right-hand side, ``Gamma' P (xi_s - Phi xi(k))``.

    Add it to ``G' Q E`` (:func:`service.solver.design.gain.optimal_moves` gives ``H^-1 G' Q E``
    only) whenever the whole move sequence of a terminal design is needed, for instance as
    the linear term of a constrained move problem.

    Parameters
    ----------
    terminal : TerminalWeight
    state : ndarray, shape (n+m,)
        ``xi(k) = [x(k); u(k-1)]``.
    target : ndarray, shape (n+m,)
        ``xi_s`` (``terminal.target @ r`` for a constant setpoint ``r``).

    Returns
    -------
    ndarray, shape (cols,)
        ``(W_P Gamma)' W_P (xi_s - Phi xi)``.
    """
    return terminal.weighted_moves.T @ (terminal.root @ (target - terminal.free_response @ state))


def with_terminal_gain(
    gain: PredictiveGain, terminal: TerminalWeight, terminal_gain: NDArray[np.float64]
) -> PredictiveGain:
    """Add the terminal term to the state, previous-input and setpoint gains.

    Parameters
    ----------
    gain : PredictiveGain
        From :func:`service.solver.design.gain.first_move_gain` with the terminal Hessian (the
        stage part: ``Kh`` and ``Kh Fx``, ``Kh Fu``, ``Kh (1 (x) I)``).
    terminal : TerminalWeight
    terminal_gain : ndarray, shape (m, n+m)
        ``Kt``.

    Returns
    -------
    PredictiveGain
        ``Kh`` unchanged; ``Kx + Kt Phi_x``, ``Ku + Kt Phi_u``, ``Kr + Kt S_r``; with input
        targets also the input-target gain ``Kt S_t`` (added to any the gain has).
    """
    n = gain.state.shape[1]
    through = terminal_gain @ terminal.free_response
    input_target = gain.input_target
    if terminal.input_target is not None:
        pull = terminal_gain @ terminal.input_target
        input_target = pull if input_target is None else input_target + pull
    return PredictiveGain(
        horizon=gain.horizon,
        state=gain.state + through[:, :n],
        previous_input=gain.previous_input + through[:, n:],
        setpoint=gain.setpoint + terminal_gain @ terminal.target,
        input_target=input_target,
    )


def terminal_free_disturbance(
    a: NDArray[np.float64], b_disturbance: NDArray[np.float64], *, inputs: int, prediction: int
) -> NDArray[np.float64]:
    """Return ``Phi_m = [sum_{l<Hp} A^l Bd; 0]``, shape (n+m, md): a held ``d_m`` in ``xi_free(k+Hp)``.

    The recursion ``F_l = A F_(l-1) + Bd`` from ``F_0 = 0`` (``Hp`` steps of the held
    disturbance); the inputs (``m = inputs`` rows) do not move without moves.
    """
    bd = np.asarray(b_disturbance, dtype=float)
    n, md = bd.shape
    acc = np.zeros((n, md))
    for _ in range(prediction):
        acc = a @ acc + bd
    return np.vstack([acc, np.zeros((inputs, md))])
