"""One call from plant matrices and tuning to a checked predictive controller.

``design_controller`` strings the solver together: prediction matrices, weighted Hessian,
positive-definiteness check and Cholesky factor, first-move gains, closed loop and warnings.
Two options change the problem, both off by default: a Riccati terminal weight on the last
predicted ``[x; u]`` (:mod:`service.solver.design.terminal`) and move blocking
(:mod:`service.solver.design.blocking`).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.linalg
from numpy.typing import ArrayLike, NDArray

from service.solver.design.blocking import blocked_prediction, check_blocking, select_moves
from service.solver.design.closed_loop import ClosedLoop, Diagnostic, closed_loop, design_warnings
from service.solver.design.gain import (
    FactoredHessian,
    PredictiveGain,
    factor_hessian,
    first_move_gain,
    hessian_matrix,
    toeplitz_hessian,
    weighted_moves,
)
from service.solver.design.input_target import InputPenalty, input_penalty, input_target_gain, with_input_target
from service.solver.design.marginal import MARGINAL_TOLERANCE, in_input_units, marginal_modes
from service.solver.design.prediction import Prediction, prediction_matrices
from service.solver.design.terminal import (
    TerminalKind,
    TerminalWeight,
    terminal_first_move_gain,
    terminal_weight,
    with_terminal_gain,
)
from service.solver.design.weights import weight_matrix, weight_root
from service.solver.estimation.target import target_problem
from service.solver.models.modes import uncontrollable_modes

__all__ = ["ControllerDesign", "design_controller"]


@dataclass(frozen=True)
class ControllerDesign:
    """Everything the unconstrained design produces, as arrays.

    Attributes
    ----------
    prediction : Prediction
        ``Fx``, ``Fu``, ``G``.  With blocking, ``G M`` (the free moves' columns only).
    output_weight : ndarray, shape (p, p)
        ``Q`` per penalized step.
    move_weight : ndarray, shape (m, m)
        ``R`` per move.
    output_root : ndarray, shape (p, p)
        ``W`` with ``W' W = Q``.
    weighted : ndarray, shape (Np*p, Hu*m)
        ``Wbar G`` (``nb*m`` columns with blocking; the last step's rows zero with the
        terminal weight, whose own rows ``W_P Gamma`` are in ``terminal.weighted_moves``).
    hessian : FactoredHessian
        Includes the terminal term ``Gamma' P Gamma`` when there is one.
    gain : PredictiveGain
        With the terminal weight ``Kx``, ``Ku`` and ``Kr`` include the terminal term and
        ``Kh`` is its stage part: ``du = Kh E + Kt (xi_s - Phi xi)``.
    loop : ClosedLoop
    warnings : list of Diagnostic
    terminal : TerminalWeight or None
        The Riccati terminal weight, when asked for.
    terminal_gain : ndarray, shape (m, n+m), or None
        ``Kt`` of the terminal weight.
    blocking : tuple of int or None
        The free move steps, when the moves are blocked.
    input_penalty : InputPenalty or None
        The input-target term (``S``, its Hessian block and pull ``P``), with an input weight.
    input_target_gain : ndarray, shape (m, m), or None
        ``Kt0``: the first move is ``Kh E + Kt0 (u_s - u(k-1))`` with ``u_s`` the steady-state
        target's input (:mod:`service.solver.design.input_target`).  ``gain`` holds the law on
        the raw setpoint and input targets.
    """

    prediction: Prediction
    output_weight: NDArray[np.float64]
    move_weight: NDArray[np.float64]
    output_root: NDArray[np.float64]
    weighted: NDArray[np.float64]
    hessian: FactoredHessian
    gain: PredictiveGain
    loop: ClosedLoop
    warnings: list[Diagnostic]
    terminal: TerminalWeight | None = None
    terminal_gain: NDArray[np.float64] | None = None
    blocking: tuple[int, ...] | None = None
    input_penalty: InputPenalty | None = None
    input_target_gain: NDArray[np.float64] | None = None

    @property
    def input_weight(self) -> NDArray[np.float64] | None:
        """``S`` of the input targets, or ``None``."""
        return None if self.input_penalty is None else self.input_penalty.weight


def design_controller(
    a: ArrayLike,
    b: ArrayLike,
    c: ArrayLike,
    *,
    output_weight: ArrayLike,
    move_weight: ArrayLike,
    prediction: int,
    control: int,
    first_penalized: int = 1,
    input_labels: Sequence[str] | None = None,
    output_labels: Sequence[str] | None = None,
    state_labels: Sequence[str] | None = None,
    terminal: TerminalKind = "none",
    blocking: Sequence[int] | None = None,
    zone_outputs: Sequence[int] = (),
    input_weight: ArrayLike | None = None,
    input_span: ArrayLike | None = None,
) -> ControllerDesign:
    """Design the unconstrained predictive controller of the design notes.

    Parameters
    ----------
    a : array_like, shape (n, n)
        Discrete state matrix.
    b : array_like, shape (n, m)
        Input matrix of the manipulated variables.
    c : array_like, shape (p, n)
        Controlled-output matrix.
    output_weight : array_like, shape (p,) or (p, p)
        ``Q``: a diagonal or a full symmetric positive-semidefinite matrix.
    move_weight : array_like, shape (m,) or (m, m)
        ``R``: a diagonal or a full symmetric positive-semidefinite matrix.
    prediction, control, first_penalized : int
        ``Hp``, ``Hu`` and ``Hw`` with ``1 <= Hu <= Hp`` and ``1 <= Hw <= Hp``.
    input_labels : sequence of str, optional
        Input names used in error messages.
    output_labels, state_labels : sequence of str, optional
        Output and state names used in the warnings about marginal modes.
    terminal : {"none", "riccati"}, optional
        ``"riccati"`` puts the stabilizing Riccati solution of the incremental system on the
        last predicted ``[x; u]`` in place of the last step's output weight
        (:mod:`service.solver.design.terminal`).  Default ``"none"``.
    blocking : sequence of int, optional
        Steps (0-based, first 0, increasing, below ``Hu``) at which moves are allowed; the
        moves in between are zero, so the input is held (:mod:`service.solver.design.blocking`).
        Default: every step free.
    zone_outputs : sequence of int, optional
        Outputs held in a zone by the move QP (their weight in ``Q`` is 0): the closed-loop
        poles they leave on the unit circle are named ``zone_output``
        (:mod:`service.solver.design.marginal`).
    input_weight : array_like, shape (m,) or (m, m), optional
        ``S`` on ``u - u_target`` over the control horizon's inputs
        (:mod:`service.solver.design.input_target`).  Default none; an all-zero weight is none.
        With the Riccati terminal weight it is in the terminal's stage cost and target too
        (:mod:`service.solver.design.terminal`).
    input_span : array_like, shape (m,), optional
        When ``b`` is of span-scaled inputs (``u / span``): the spans, so that the input
        directions of the marginal modes, and the warnings that quote them, are in the inputs'
        own units (:func:`service.solver.design.marginal.in_input_units`).  Everything else
        stays in the scaled units given.  Default: the units given.

    Returns
    -------
    ControllerDesign

    Raises
    ------
    service.errors.HessianNotPositiveDefinite
        When unpenalized moves are invisible to the outputs.
    service.errors.NumericalError
        Pointer ``/weights/terminal`` when the Riccati terminal weight does not exist.

    Examples
    --------
    A scalar plant with one-step horizons; the gain follows by hand (see the tests):

    >>> d = design_controller([[0.5]], [[1.0]], [[1.0]], output_weight=[1.0],
    ...                       move_weight=[1.0], prediction=1, control=1)
    >>> round(float(d.gain.state[0, 0]), 12)
    0.25
    """
    a_ = np.asarray(a, dtype=float)
    b_ = np.asarray(b, dtype=float)
    c_ = np.asarray(c, dtype=float)
    p, m = c_.shape[0], b_.shape[1]
    q = weight_matrix(output_weight, p)
    r = weight_matrix(move_weight, m)
    pred = prediction_matrices(a_, b_, c_, prediction=prediction, control=control, first_penalized=first_penalized)
    free = None if blocking is None else check_blocking(blocking, control=control)
    if free is not None:
        pred = blocked_prediction(pred, free)
    moves = control if free is None else len(free)
    root = weight_root(q)
    weighted = weighted_moves(pred, root)
    rows = weighted
    s = None if input_weight is None else weight_matrix(input_weight, m)
    if s is not None and not np.any(s):
        s = None  # an all-zero input weight is none
    term = None
    if terminal == "riccati":
        term = terminal_weight(
            a_, b_, c_, output_weight=q, move_weight=r, prediction=prediction, control=control, input_weight=s
        )
        if free is not None:
            term = dataclasses.replace(term, moves=select_moves(term.moves, free, inputs=m))
        weighted = weighted.copy()
        weighted[-p:] = 0.0  # the last step's output weight gives way to P
        rows = np.vstack([weighted, term.weighted_moves])
    else:
        assert terminal == "none", f"unknown terminal weight {terminal!r}"
    penalty = None if s is None else input_penalty(s, control=control, free=free)
    if term is None and (free is None or free == tuple(range(control))):
        matrix = toeplitz_hessian(pred, weighted, root, r)  # G keeps its block-Toeplitz form
    else:
        matrix = hessian_matrix(rows, r, control=moves)
    if penalty is not None:
        matrix = matrix + penalty.hessian
    hessian = factor_hessian(
        matrix,
        weighted=rows,
        move_weight=r,
        control=moves,
        outputs=p,
        input_labels=input_labels,
    )
    gain = first_move_gain(pred, hessian, weighted, root)
    kt = None
    if term is not None:
        kt = terminal_first_move_gain(hessian, term, inputs=m)
        gain = with_terminal_gain(gain, term, kt)
    kt0 = None
    if penalty is not None:
        kt0 = input_target_gain(hessian, penalty)
        target = target_problem(a_, b_, c_, output_weight=q, input_weight=penalty.weight)
        n = a_.shape[0]
        gain = with_input_target(
            gain, kt0, setpoint_input=target.setpoint_map[n:], target_input=target.input_target_map[n:]
        )
    loop = closed_loop(a_, b_, gain.state, gain.previous_input)
    marginal = tuple(
        marginal_modes(
            a_,
            b_,
            c_,
            output_root=root,
            weighted=rows,
            poles=loop.poles,
            input_weight_root=None if penalty is None else weight_root(penalty.weight),
            zone_outputs=zone_outputs,
        )
    )
    if input_span is not None:
        marginal = in_input_units(marginal, np.asarray(input_span, dtype=float))
    loop = dataclasses.replace(loop, marginal=marginal, stable=loop.stable and not marginal)
    outside = _unstable_plant_modes(a_, b_, c_, root) if loop.unstable else {}
    warnings = design_warnings(
        condition_number=hessian.scaled_condition_number,
        loop=loop,
        input_labels=input_labels,
        output_labels=output_labels,
        state_labels=state_labels,
        # more inputs than outputs leave a steady input combination no output sees: without
        # input targets on it the Riccati equation has no stabilizing solution
        terminal_possible=term is None and (penalty is not None or m <= p),
        **outside,
    )
    return ControllerDesign(
        prediction=pred,
        output_weight=q,
        move_weight=r,
        output_root=root,
        weighted=weighted,
        hessian=hessian,
        gain=gain,
        loop=loop,
        warnings=warnings,
        terminal=term,
        terminal_gain=kt,
        blocking=free,
        input_penalty=penalty,
        input_target_gain=kt0,
    )


def _unstable_plant_modes(
    a: NDArray[np.float64], b: NDArray[np.float64], c: NDArray[np.float64], output_root: NDArray[np.float64]
) -> dict[str, Any]:
    """The plant's modes outside the unit circle, by what a tuning can do about them.

    Returns the keywords of :func:`service.solver.design.closed_loop.design_warnings`:
    ``plant_unstable`` (how many eigenvalues of ``A`` lie outside ``1 + MARGINAL_TOLERANCE``),
    ``fixed_poles`` (those no input moves: PBH test on ``(A, B)``), ``hidden_poles`` (those
    no controlled output shows: the dual test on ``(A', C')``) and ``unweighted_poles``
    (those no weighted output sees: on ``(A', (W C)')``, ``W' W = Q``; the hidden ones
    among them).  A right eigenvector ``v`` with ``W C v = 0`` has a zero weighted free
    response, so ``Kx v = 0`` and ``[v; 0]`` is an eigenvector of the closed loop: no horizon
    or weight moves it (the argument of :mod:`service.solver.design.marginal`, off the circle).
    """
    smallest = 1.0 + MARGINAL_TOLERANCE
    values = scipy.linalg.eigvals(a, check_finite=False) if a.size else np.zeros(0, dtype=complex)
    return {
        "plant_unstable": int(np.count_nonzero(np.abs(values) > smallest)),
        # one eigenvalue problem for the three tests (A' has the eigenvalues of A)
        "fixed_poles": _complexes(uncontrollable_modes(a, b, smallest_modulus=smallest, poles=values)),
        "hidden_poles": _complexes(uncontrollable_modes(a.T, c.T, smallest_modulus=smallest, poles=values)),
        "unweighted_poles": _complexes(
            uncontrollable_modes(a.T, (output_root @ c).T, smallest_modulus=smallest, poles=values)
        ),
    }


def _complexes(values: NDArray[np.complex128]) -> tuple[complex, ...]:
    return tuple(complex(z) for z in values)
