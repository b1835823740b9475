"""A run under limits, and the check of the unconstrained law against limits.

The pieces the schema edge strings together with :mod:`service.solver.limits.policy` (the move
QP as the loop's move policy):

- :class:`GainWhenFreePolicy` wraps the constrained policy so that a step whose unconstrained
  optimum meets every limit applies the design's own ``du = Kh E``, the very product of
  :class:`service.solver.evaluation.simulation.UnconstrainedPolicy`: limits that never bind then give the
  fixed-gain run to the rounding of the products (the fixed-gain run groups them once for all
  steps), not only to the rounding of a second solve (``H^-1 G'Q E`` by the Cholesky factor
  differs from ``Kh E`` by about ``cond(H) eps``).
- :class:`ReachableTargetRule`, a :class:`service.solver.evaluation.simulation.TargetRule`: at every
  step the nearest steady state reachable inside the input limits
  (:class:`service.solver.limits.reachable_target.ReachableTargetProblem`), so that a setpoint the
  limits put out of reach does not keep the controller pressing against a limit (windup).
  It records each step's status for the report.
- :func:`nominal_setpoint_run` and :func:`limit_excursions`: the design's fixed law
  ``du(k) = Kr r - Kx x(k) - Ku u(k-1)`` (the design notes) on the nominal model with the
  state known, after a setpoint step from rest, and where its trajectory leaves the limits.
  This answers "would the unconstrained controller alone break these limits for this
  step?" before any QP is involved.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from service.solver.design.gain import PredictiveGain
from service.solver.estimation.loop import ControlLoop
from service.solver.estimation.target import TargetProblem, with_measured_disturbances
from service.solver.evaluation.simulation import PolicyStep
from service.solver.limits.bounds import Limits, limit_violations
from service.solver.limits.policy import ConstrainedPolicy, StepReport
from service.solver.limits.qp import PRIMAL_TOLERANCE
from service.solver.limits.reachable_target import ReachableTargetProblem

__all__ = [
    "EXCURSION_TOLERANCE",
    "GainWhenFreePolicy",
    "LimitExcursion",
    "NominalRun",
    "ReachableTargetRule",
    "limit_excursions",
    "nominal_setpoint_run",
]

#: A limit counts as broken when the signal passes it by more than this, relative to
#: ``max(1, |limit|)`` (rounding of a trajectory that runs along a limit is not a violation).
EXCURSION_TOLERANCE = 1e-9

#: A nominal run stops once the squared norm of its state or input passes this (an unstable
#: law), far below overflow.
_DIVERGENCE = 1e200


class GainWhenFreePolicy:
    """A :class:`ConstrainedPolicy` that applies ``Kh E`` itself whenever no limit is in the way.

    Parameters
    ----------
    policy : ConstrainedPolicy
    horizon_gain : ndarray, shape (m, Np*p)
        ``Kh`` of the same design.
    target_gain : ndarray, shape (m, m), optional
        ``Kt0`` of the same design with an input weight: the move is then
        ``Kh E + Kt0 (u_s - u(k-1))``.
    terminal_gain : ndarray, shape (m, n+m), optional
        ``Kt`` of the same design with the Riccati terminal weight: the move gains ``Kt e_t``.

    Notes
    -----
    On a step the QP answered with the unconstrained optimum (``method == "unconstrained"``),
    the move becomes ``Kh E``, the same number to rounding; it is kept only if it still meets
    the input and move limits of the move applied now (to ``10 x`` the QP's tolerance), which
    the QP's own first move met.  The step's report is the QP's.
    """

    def __init__(
        self,
        policy: ConstrainedPolicy,
        horizon_gain: NDArray[np.float64],
        target_gain: NDArray[np.float64] | None = None,
        terminal_gain: NDArray[np.float64] | None = None,
    ) -> None:
        self.policy = policy
        self.horizon_gain = horizon_gain
        self.target_gain = target_gain
        self.terminal_gain = terminal_gain

    def __call__(
        self,
        *,
        error: NDArray[np.float64],
        free_prediction: NDArray[np.float64],
        previous_input: NDArray[np.float64],
        step: int,
        target_input: NDArray[np.float64] | None = None,
        terminal_error: NDArray[np.float64] | None = None,
    ) -> PolicyStep:
        result = self.policy(
            error=error,
            free_prediction=free_prediction,
            previous_input=previous_input,
            step=step,
            target_input=target_input,
            terminal_error=terminal_error,
        )
        report = result.report
        if not isinstance(report, StepReport) or report.method != "unconstrained" or not report.solved:
            return result
        move = self.horizon_gain @ error
        if self.target_gain is not None:
            assert target_input is not None
            move = move + self.target_gain @ (target_input - previous_input)
        if self.terminal_gain is not None:
            assert terminal_error is not None
            move = move + self.terminal_gain @ terminal_error
        lim = self.policy.limits
        u = previous_input + move
        slack = 10.0 * PRIMAL_TOLERANCE
        if (
            np.all(np.abs(move) <= lim.move_max + slack)
            and np.all(u >= lim.input_min - slack)
            and np.all(u <= lim.input_max + slack)
        ):
            return PolicyStep(move=move, report=report)
        return result


class ReachableTargetRule:
    """The nearest reachable steady state inside the input limits, as the loop's target rule.

    Parameters
    ----------
    problem : ReachableTargetProblem
        Set up once for the loop's target equations and the input limits.
    target : TargetProblem
        The same target equations (``loop.target``): when the limits are not in the way the
        rule answers with their linear maps ``z_s = Z_r r + Z_d d``, ``u_s = S_r r + S_d d``,
        the loop's own default target.

    Attributes
    ----------
    statuses : list of str
        One per call (per simulated step): ``"unconstrained"`` (the limits were not in the
        way: the target is the unconstrained one), ``"optimal"`` (the target was moved to the
        nearest reachable steady state) or a failure of the target QP (``"infeasible"``,
        ``"iteration_limit"``, ``"failed"``; the target is then the unconstrained one with its
        input clipped into the limits).
    reachable : list of bool
        One per call: whether the target's outputs are the setpoint itself
        (:attr:`service.solver.limits.reachable_target.ReachableTarget.reachable`).

    Notes
    -----
    Stateful (the QP workspaces and the record): one instance per run.
    """

    def __init__(self, problem: ReachableTargetProblem, target: TargetProblem, *, measured: int = 0) -> None:
        self.problem = problem
        self.target = target
        self.measured = measured
        self.statuses: list[str] = []
        self.reachable: list[bool] = []

    @classmethod
    def from_loop(
        cls, loop: ControlLoop, limits: Limits, *, b_disturbance: NDArray[np.float64] | None = None
    ) -> ReachableTargetRule:
        """Set up the target QP of ``loop``'s target equations under ``limits``' input limits.

        With ``b_disturbance`` (``Bd`` (n, md) of the measured disturbances, in the loop's
        signals) the target equations also hold the held measured disturbances
        (:func:`service.solver.estimation.target.with_measured_disturbances`): a disturbance that
        needs more input than the limits allow makes the setpoint unreachable, and the target
        moves to the nearest steady state the inputs can hold under it.
        """
        target = loop.target
        measured = 0 if b_disturbance is None else int(np.asarray(b_disturbance).shape[1])
        if measured:
            target = with_measured_disturbances(target, np.asarray(b_disturbance, dtype=float))
        return cls(
            ReachableTargetProblem(target, input_min=limits.input_min, input_max=limits.input_max),
            target,
            measured=measured,
        )

    def __call__(
        self,
        *,
        setpoint: NDArray[np.float64],
        disturbance: NDArray[np.float64],
        input_target: NDArray[np.float64] | None = None,
        with_state: bool = False,
        measured_disturbance: NDArray[np.float64] | None = None,
    ) -> tuple[NDArray[np.float64], ...]:
        """Return ``(z_s, u_s)`` of the nearest reachable steady state for ``r``, ``d`` (and ``u_t``, ``d_m``).

        With ``with_state`` also its plant states ``x_s`` (the terminal weight's target).  A rule
        set up with measured disturbances takes their held levels ``d_m`` (md,) as
        ``measured_disturbance`` (zero when left out).
        """
        # a rule set up without them would leave d_m out of the target (a programming error)
        assert measured_disturbance is None or measured_disturbance.size == self.measured, self.measured
        if self.measured:
            held = np.zeros(self.measured) if measured_disturbance is None else measured_disturbance
            disturbance = np.concatenate([disturbance, held])
        target = self.problem.solve(setpoint, disturbance if disturbance.size else None, input_target)
        self.statuses.append(target.status)
        self.reachable.append(target.reachable)
        if target.status != "unconstrained":
            return (target.output, target.input, target.state) if with_state else (target.output, target.input)
        maps = self.target
        output = maps.output_setpoint_map @ setpoint
        steady = maps.setpoint_map @ setpoint
        if disturbance.size:
            output = output + maps.output_disturbance_map @ disturbance
            steady = steady + maps.disturbance_map @ disturbance
        if input_target is not None:
            steady = steady + maps.input_target_map @ input_target
        n = maps.state_size
        return (output, steady[n:], steady[:n]) if with_state else (output, steady[n:])


@dataclass(frozen=True)
class NominalRun:
    """The fixed law on the nominal model after a setpoint step from rest.

    Attributes
    ----------
    inputs : ndarray, shape (N, m)
        ``u(0) .. u(N-1)``.
    outputs : ndarray, shape (N, p)
        ``z(1) .. z(N)``: row ``k`` is the output one sample after ``u(k)`` is applied.
    previous_input : ndarray, shape (m,)
        ``u(-1) = 0``.
    completed : bool
        False when the law blew up and the run was cut (``N`` is then below the steps asked).
    """

    inputs: NDArray[np.float64]
    outputs: NDArray[np.float64]
    previous_input: NDArray[np.float64]
    completed: bool


def nominal_setpoint_run(
    a: ArrayLike, b: ArrayLike, c: ArrayLike, gain: PredictiveGain, *, setpoint: ArrayLike, steps: int
) -> NominalRun:
    """Run ``du(k) = Kr r - Kx x(k) - Ku u(k-1)`` on ``x+ = A x + B u``, ``z = C x`` from rest.

    Parameters
    ----------
    a, b, c : array_like, shapes (n, n), (n, m), (p, n)
        The nominal model, in the units of ``gain``.
    gain : PredictiveGain
        ``Kr`` (m, p), ``Kx`` (m, n) and ``Ku`` (m, m) of the design.
    setpoint : array_like, shape (p,)
        ``r``, held from step 0 on; the run starts at ``x(0) = 0``, ``u(-1) = 0`` (rest at the
        model's origin, where the setpoint was 0).
    steps : int
        ``N >= 1`` samples.

    Returns
    -------
    NominalRun

    Examples
    --------
    The scalar plant of :func:`service.solver.design.controller.design_controller`'s example, with
    ``Hp = Hu = 1``: minimizing ``(0.5 x + u(k-1) + du - r)^2 + du^2`` gives
    ``du = (r - 0.5 x - u(k-1)) / 2`` by hand, so from rest ``u(0) = 0.5``, ``z(1) = 0.5``,
    then ``du(1) = (1 - 0.25 - 0.5) / 2 = 0.125``, ``u(1) = 0.625``, ``z(2) = 0.875``:

    >>> from service.solver.design.controller import design_controller
    >>> d = design_controller([[0.5]], [[1.0]], [[1.0]], output_weight=[1.0],
    ...                       move_weight=[1.0], prediction=1, control=1)
    >>> run = nominal_setpoint_run([[0.5]], [[1.0]], [[1.0]], d.gain, setpoint=[1.0], steps=2)
    >>> [round(float(v), 12) for v in run.inputs[:, 0]], [round(float(v), 12) for v in run.outputs[:, 0]]
    ([0.5, 0.625], [0.5, 0.875])
    """
    a_, b_, c_ = (np.asarray(v, dtype=float) for v in (a, b, c))
    n, m = b_.shape
    r = np.asarray(setpoint, dtype=float)
    assert steps >= 1 and r.shape == (c_.shape[0],), (steps, r.shape)
    hold = np.eye(m) - gain.previous_input
    inputs = np.zeros((steps, m))
    outputs = np.zeros((steps, c_.shape[0]))
    x, u = np.zeros(n), np.zeros(m)
    rows = steps
    with np.errstate(over="ignore", invalid="ignore"):  # absurd numbers end the run, checked below
        drive = gain.setpoint @ r
        for k in range(steps):
            u = drive - gain.state @ x + hold @ u
            x = a_ @ x + b_ @ u
            z = c_ @ x
            if not (x @ x < _DIVERGENCE and u @ u < _DIVERGENCE and z @ z < _DIVERGENCE):
                rows = k
                break
            inputs[k] = u
            outputs[k] = z
    return NominalRun(inputs=inputs[:rows], outputs=outputs[:rows], previous_input=np.zeros(m), completed=rows == steps)


@dataclass(frozen=True)
class LimitExcursion:
    """The worst excursion of one signal past one of its limits.

    Attributes
    ----------
    kind : str
        ``"input"``, ``"move"`` or ``"output"``.
    side : str
        ``"min"`` or ``"max"`` (for a move, ``"max"`` when ``du > move_max`` and ``"min"`` when
        ``du < -move_max``).
    index : int
        Which input or output.
    step : int
        Row of the trajectory where the excursion is largest (plus the ``first`` offset the
        caller gave for that kind).
    value : float
        The signal there (the move ``du`` for a move).
    limit : float
        The limit it passes (``-move_max`` for a move's ``"min"`` side).
    """

    kind: str
    side: str
    index: int
    step: int
    value: float
    limit: float


def limit_excursions(
    limits: Limits,
    *,
    inputs: ArrayLike,
    previous_input: ArrayLike,
    outputs: ArrayLike | None = None,
    first_output_step: int = 0,
    tolerance: float = EXCURSION_TOLERANCE,
) -> tuple[LimitExcursion, ...]:
    """Return the worst excursion past each limit a trajectory breaks, one per signal and side.

    Parameters
    ----------
    limits : Limits
    inputs : array_like, shape (N, m)
        ``u(0) .. u(N-1)`` (finite).
    previous_input : array_like, shape (m,)
        ``u(-1)``, for the first move.
    outputs : array_like, shape (No, p), optional
        Controlled outputs to hold against the output limits (finite).
    first_output_step : int, optional
        The step of ``outputs``' first row (1 for :attr:`NominalRun.outputs`).
    tolerance : float, optional
        Relative tolerance (default :data:`EXCURSION_TOLERANCE`).

    Returns
    -------
    tuple of LimitExcursion
        In the order inputs, moves, outputs; within each by signal, ``"min"`` before ``"max"``.
        Empty when every limit holds.  The signals are those that
        :func:`service.solver.limits.bounds.limit_violations` finds violated (beyond the tolerance).
    """
    u = np.atleast_2d(np.asarray(inputs, dtype=float))
    u_prev = np.asarray(previous_input, dtype=float)
    du = np.diff(np.vstack([u_prev[None, :], u]), axis=0)
    z = None if outputs is None else np.atleast_2d(np.asarray(outputs, dtype=float))
    worst = limit_violations(limits, inputs=u, previous_input=u_prev, outputs=z)
    blocks = [
        ("input", u, limits.input_min, limits.input_max, worst.input, 0),
        ("move", du, -limits.move_max, limits.move_max, worst.move, 0),
    ]
    if z is not None and z.size:
        blocks.append(("output", z, limits.output_min, limits.output_max, worst.output, first_output_step))
    found: list[LimitExcursion] = []
    for kind, values, low, high, largest, first in blocks:
        if values.shape[0] == 0:
            continue
        for j in range(values.shape[1]):
            for side, bound, excess in (
                ("min", low[j], low[j] - values[:, j]),
                ("max", high[j], values[:, j] - high[j]),
            ):
                if not np.isfinite(bound) or largest[j] <= tolerance * max(1.0, abs(float(bound))):
                    continue
                row = int(np.argmax(excess))
                if excess[row] <= tolerance * max(1.0, abs(float(bound))):
                    continue
                found.append(LimitExcursion(kind, side, j, first + row, float(values[row, j]), float(bound)))
    return tuple(found)
