"""The constrained move policy: one move QP per step, plugged into the simulation loop.

:class:`ConstrainedPolicy` follows :class:`service.solver.evaluation.simulation.MovePolicy`: the loop
hands it the free-response error, the free prediction and the previous input; it solves the
move QP of :mod:`service.solver.limits.qp` and returns the first move with a report of the step.
A failed or infeasible solve never raises: the step holds the last input (``du = 0``) and
the report flags a fallback.  Without any active limit the move is the unconstrained
``Kh E`` of the design (to rounding), so the fixed gain is the special case of this policy.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.solver.design.controller import ControllerDesign
from service.solver.evaluation.simulation import PolicyStep
from service.solver.limits.bounds import Limits
from service.solver.limits.qp import PRIMAL_TOLERANCE, MoveQP, MoveSolution
from service.solver.limits.zones import Zones

__all__ = ["ConstrainedPolicy", "step_report"]


def step_report(solution: MoveSolution, *, applied_input: NDArray[np.float64], limits: Limits) -> dict[str, Any]:
    """Return the report of one step as plain Python values (lists, numbers, strings).

    Parameters
    ----------
    solution : MoveSolution
    applied_input : ndarray, shape (m,)
        ``u(k)`` as applied (the previous input on a fallback).
    limits : Limits

    Returns
    -------
    dict
        ``status`` (str), ``solved`` (bool), ``fallback`` (bool: the step held the last
        input), ``method`` (``"unconstrained"`` or ``"active_set"``), ``iterations`` (int),
        ``active_limits`` (list of ``{"kind", "side", "index", "step"}``, see
        :class:`service.solver.limits.qp.ActiveLimit`), ``output_max_slack`` and
        ``output_min_slack`` (p floats each: slack used on each soft output bound),
        ``inputs_at_min``, ``inputs_at_max`` and ``moves_at_limit`` (indices of the inputs
        whose applied value or move sits on its limit this step).
    """
    tolerance = 10.0 * PRIMAL_TOLERANCE * np.maximum(1.0, np.abs(applied_input))
    first = solution.moves[: limits.inputs] if solution.solved else np.zeros(limits.inputs)
    return {
        "status": solution.status,
        "solved": solution.solved,
        "fallback": not solution.solved,
        "method": solution.method,
        "iterations": solution.iterations,
        "active_limits": [{"kind": a.kind, "side": a.side, "index": a.index, "step": a.step} for a in solution.active],
        "output_max_slack": [float(v) for v in solution.output_max_slack],
        "output_min_slack": [float(v) for v in solution.output_min_slack],
        "inputs_at_min": [int(i) for i in np.flatnonzero(applied_input <= limits.input_min + tolerance)],
        "inputs_at_max": [int(i) for i in np.flatnonzero(applied_input >= limits.input_max - tolerance)],
        "moves_at_limit": [int(i) for i in np.flatnonzero(np.abs(first) >= limits.move_max - tolerance)],
    }


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
    ) -> PolicyStep:
        """Return ``du(k)`` (the QP's first move, or zeros on a fallback) and the step's report."""
        solution = self.qp.solve(error=error, free_prediction=free_prediction, previous_input=previous_input)
        m = self.limits.inputs
        move = solution.moves[:m].copy() if solution.solved else np.zeros(m)
        report = step_report(solution, applied_input=previous_input + move, limits=self.limits)
        return PolicyStep(move=move, report=report)
