"""The constrained move policy: one move QP per step, plugged into the simulation loop.

:class:`ConstrainedPolicy` follows :class:`service.solver.evaluation.simulation.MovePolicy`: the loop
hands it the free-response error, the free prediction and the previous input; it solves the
move QP of :mod:`service.solver.limits.qp` and returns the first move with a report of the step.
A failed or infeasible solve never raises: the step holds the last input (``du = 0``) and
the report flags a fallback.  Without any active limit the move is the unconstrained
``Kh E`` of the design (to rounding), so the fixed gain is the special case of this policy.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.solver.design.controller import ControllerDesign
from service.solver.evaluation.simulation import PolicyStep
from service.solver.limits.bounds import Limits
from service.solver.limits.qp import PRIMAL_TOLERANCE, ActiveLimit, MoveQP, MoveSolution
from service.solver.limits.zones import Zones

__all__ = ["ConstrainedPolicy", "StepReport", "step_report"]


@dataclass(frozen=True)
class StepReport:
    """The report of one step of a run under limits (in scaled signals).

    Attributes
    ----------
    status : str
        The QP solver's status of the step.
    solved : bool
    fallback : bool
        The step held the last input (``du = 0``) because the QP was not solved.
    method : {"unconstrained", "active_set"}
        ``"unconstrained"`` when the unconstrained optimum kept every limit.
    iterations : int
    active_limits : tuple of ActiveLimit
        Every limit the solution holds at its bound, over the whole horizon.
    output_max_slack, output_min_slack : ndarray, shape (p,)
        Slack used on each soft output bound.
    inputs_at_min, inputs_at_max, moves_at_limit : tuple of int
        Inputs whose applied value (or move) sits on its limit this step.
    """

    status: str
    solved: bool
    fallback: bool
    method: str
    iterations: int
    active_limits: tuple[ActiveLimit, ...]
    output_max_slack: NDArray[np.float64]
    output_min_slack: NDArray[np.float64]
    inputs_at_min: tuple[int, ...]
    inputs_at_max: tuple[int, ...]
    moves_at_limit: tuple[int, ...]


def step_report(solution: MoveSolution, *, applied_input: NDArray[np.float64], limits: Limits) -> StepReport:
    """Return the report of one step.

    Parameters
    ----------
    solution : MoveSolution
    applied_input : ndarray, shape (m,)
        ``u(k)`` as applied (the previous input on a fallback).
    limits : Limits

    Returns
    -------
    StepReport
    """
    tolerance = 10.0 * PRIMAL_TOLERANCE * np.maximum(1.0, np.abs(applied_input))
    first = solution.moves[: limits.inputs] if solution.solved else np.zeros(limits.inputs)

    def indices(flags: NDArray[np.bool_]) -> tuple[int, ...]:
        return tuple(int(i) for i in np.flatnonzero(flags))

    return StepReport(
        status=solution.status,
        solved=solution.solved,
        fallback=not solution.solved,
        method=solution.method,
        iterations=solution.iterations,
        active_limits=tuple(solution.active),
        output_max_slack=np.array(solution.output_max_slack, dtype=float),
        output_min_slack=np.array(solution.output_min_slack, dtype=float),
        inputs_at_min=indices(applied_input <= limits.input_min + tolerance),
        inputs_at_max=indices(applied_input >= limits.input_max - tolerance),
        moves_at_limit=indices(np.abs(first) >= limits.move_max - tolerance),
    )


class ConstrainedPolicy:
    """A :class:`service.solver.evaluation.simulation.MovePolicy` that solves the move QP every step.

    Parameters
    ----------
    qp : MoveQP
        Set up once for the design and limits; the policy keeps its warm start.
    limits : Limits
        The same limits (for the report).

    Notes
    -----
    Stateful (the QP's workspace and warm start): one instance per run.
    """

    def __init__(self, qp: MoveQP, limits: Limits) -> None:
        self.qp = qp
        self.limits = limits

    @classmethod
    def from_design(
        cls,
        design: ControllerDesign,
        limits: Limits,
        *,
        hard_outputs: bool = False,
        zones: Zones | None = None,
        warm_start: str = "previous",
    ) -> ConstrainedPolicy:
        """Set up the move QP of ``design`` under ``limits`` (and ``zones``) and wrap it."""
        qp = MoveQP.from_design(design, limits, hard_outputs=hard_outputs, zones=zones, warm_start=warm_start)
        return cls(qp, limits)

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
        """Return ``du(k)`` (the QP's first move, or zeros on a fallback) and the step's report."""
        solution = self.qp.solve(
            error=error,
            free_prediction=free_prediction,
            previous_input=previous_input,
            target_input=target_input,
            terminal_error=terminal_error,
        )
        m = self.limits.inputs
        move = solution.moves[:m].copy() if solution.solved else np.zeros(m)
        report = step_report(solution, applied_input=previous_input + move, limits=self.limits)
        return PolicyStep(move=move, report=report)
