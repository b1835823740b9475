"""Limits on the manipulated variables, their moves and the controlled outputs: request and reports.

The request block ``limits`` sits on every /design request (so /simulate inherits it).  All
numbers are in the engineering units of the model's tags, and apply to the model's own
signals: when the model is written in deviations from an operating point, so are its limits.
On /simulate each step solves the move QP under these limits (``service.solver.limits.qp``); on
/design the unconstrained law is checked against them for a nominal setpoint step
(:class:`LimitCheckReport`).
"""

from __future__ import annotations

from typing import Annotated

from pydantic import Field

from service.schemas.common import FiniteFloat, RequestModel, ResponseModel

__all__ = [
    "DEFAULT_OUTPUT_SOFTNESS",
    "MAX_OUTPUT_SOFTNESS",
    "ActiveLimitReport",
    "LimitCheckReport",
    "LimitExcursionReport",
    "LimitRunReport",
    "LimitSignalSummary",
    "LimitStepReport",
    "LimitSummary",
    "LimitsRequest",
    "OutputZone",
    "ZoneReport",
    "ZoneRunReport",
]

#: Default ``output_softness`` of the contract: the solver's own default
#: (``service.solver.limits.bounds.DEFAULT_OUTPUT_SOFTNESS``; a test keeps the two equal).
DEFAULT_OUTPUT_SOFTNESS = 1.0e5

#: Largest accepted ``output_softness``: beyond it the penalty only worsens the QP's numbers.
MAX_OUTPUT_SOFTNESS = 1e12

#: Largest accepted zone weight (as large as any QP slack weight may be).
MAX_ZONE_WEIGHT = 1e12

OptionalVector = list[FiniteFloat | None]


class LimitsRequest(RequestModel):
    """Hard limits on the manipulated variables and their moves, soft (or hard) limits on the outputs.

    Each vector is optional and, when given, has one entry per signal, ``null`` for "no limit".
    """

    input_min: OptionalVector | None = Field(
        default=None, description="Lowest value of each manipulated variable (hard), engineering units."
    )
    input_max: OptionalVector | None = Field(
        default=None, description="Highest value of each manipulated variable (hard), engineering units."
    )
    move_max: OptionalVector | None = Field(
        default=None,
        description="Largest |u(k) - u(k-1)| of each manipulated variable per sample (hard), engineering "
        "units; above 0.",
    )
    output_min: OptionalVector | None = Field(
        default=None,
        description="Lowest value of each controlled output (soft unless hard_outputs), engineering units. "
        "Applied at the predicted steps some move reaches (past the dead time of the inputs to that output).",
    )
    output_max: OptionalVector | None = Field(
        default=None,
        description="Highest value of each controlled output (soft unless hard_outputs), engineering units. "
        "Applied at the predicted steps some move reaches (past the dead time of the inputs to that output).",
    )
    output_softness: Annotated[FiniteFloat, Field(ge=0, le=MAX_OUTPUT_SOFTNESS)] = Field(
        default=DEFAULT_OUTPUT_SOFTNESS,
        description="Linear penalty on a soft output limit's slack: cost per unit of scaled violation (the "
        "violation divided by the output's span, the largest over the prediction horizon), in the units of "
        "the QP's cost 1/2 (sum |z - r|^2_Q + sum |du|^2_R) of scaled signals. Above the limit's "
        "multipliers the penalty is exact: the limit holds whenever it can.",
    )
    hard_outputs: bool = Field(
        default=False,
        description="Treat the output limits as hard. The QP may then be infeasible; such a step holds the "
        "last input and is flagged as a fallback.",
    )
    clamp_initial_input: bool = Field(
        default=False,
        description="Clip an initial input outside its limits into them (with a warning) instead of "
        "refusing the request.",
    )
    nominal_step: list[FiniteFloat] | None = Field(
        default=None,
        description="/design only: the setpoint step of the limit check, one value per controlled output, "
        "engineering units (default 1 per output).",
    )


class LimitExcursionReport(ResponseModel):
    """The worst excursion of one signal past one of its limits."""

    kind: str = Field(description="'input', 'move' or 'output'.")
    side: str = Field(description="'min' or 'max' (a move below -move_max is 'min').")
    signal: str = Field(description="Tag of the manipulated variable or controlled output.")
    step: int = Field(description="Sample of the worst excursion (inputs and moves u(k), outputs z(k)).")
    value: float = Field(description="The signal there (the move for a move limit), engineering units.")
    limit: float = Field(description="The limit it passes (-move_max on the 'min' side of a move).")


class LimitCheckReport(ResponseModel):
    """Whether the unconstrained law alone breaks the limits for the nominal setpoint step.

    The nominal setpoint step: the nominal model at rest at its origin (x(0) = 0, u(-1) = 0,
    setpoint 0) receives a setpoint step to ``nominal_step`` at sample 0; the design's fixed law
    du(k) = Kr r - Kx x(k) - Ku u(k-1) acts on the known state for Hp samples.  Inputs and
    moves u(0)..u(Hp-1) and outputs z(1)..z(Hp) are held against the limits (soft output
    limits as if hard).
    """

    violated: bool
    violations: list[LimitExcursionReport] = Field(description="One per signal and side broken: its worst sample.")
    nominal_step: list[float] = Field(description="The setpoint step used, engineering units.")
    steps: int = Field(description="Samples checked (Hp; fewer when the law blew up).")


class ActiveLimitReport(ResponseModel):
    """A limit the step's QP held at its bound."""

    kind: str = Field(description="'input', 'move' or 'output'.")
    side: str = Field(description="'min' or 'max'.")
    signal: str = Field(description="Tag of the manipulated variable or controlled output.")


class LimitStepReport(ResponseModel):
    """One step of the run at which the limits mattered."""

    step: int
    status: str = Field(description="The QP's status: 'optimal', 'infeasible', 'iteration_limit', 'failed', ...")
    iterations: int = Field(description="Active-set iterations (0: the unconstrained optimum met every limit).")
    fallback: bool = Field(description="The QP failed: the step held the last input (du = 0).")
    active: list[ActiveLimitReport] = Field(
        description="Active limits of the applied move (inputs and moves at step 0 of the control horizon) and "
        "of the outputs at the first penalized step."
    )
    active_in_horizon: int = Field(description="Active limits over the whole horizon (later steps included).")
    output_max_slack: list[float] | None = Field(
        description="Slack used on each output's soft upper limit (its largest violation the QP accepted over the "
        "predicted steps some move reaches: the steps inside the dead time are not limited), engineering units; "
        "null when none was used."
    )
    output_min_slack: list[float] | None = Field(description="The same for the lower limits.")
    target: list[float] | None = Field(
        description="The corrected setpoint the controller aimed at, when the setpoint was out of reach inside "
        "the input limits (the nearest reachable steady state), engineering units; null otherwise."
    )


class LimitRunReport(ResponseModel):
    """The move QP step by step, listing only the steps at which the limits mattered.

    A step is listed when its QP needed the active-set solver, held a limit active, used a
    slack, fell back, or aimed at a corrected setpoint. Every step not listed solved with the
    unconstrained optimum (status 'optimal', 0 iterations, no active limit, no slack) and
    aimed at the setpoint itself.
    """

    steps: list[LimitStepReport]
    hard_outputs: bool


class LimitSignalSummary(ResponseModel):
    """Time one signal spent at one of its limits."""

    kind: str = Field(description="'input', 'move' or 'output'.")
    side: str = Field(description="'min' or 'max'.")
    signal: str
    limit: float = Field(description="Engineering units (move_max for both sides of a move).")
    steps_at_limit: int = Field(description="Steps at which this limit was active (see LimitStepReport.active).")
    fraction: float = Field(description="steps_at_limit over the steps simulated.")
    largest_slack: float | None = Field(
        description="Outputs with soft limits: the largest slack used on this limit, engineering units; null "
        "for inputs, moves and hard output limits."
    )


class LimitSummary(ResponseModel):
    """The run's time at each limit, its fallbacks and its corrected setpoints."""

    signals: list[LimitSignalSummary] = Field(description="One per limit present (signal and side).")
    fallbacks: int = Field(description="Steps whose QP failed and held the last input.")
    solver_iterations: int = Field(description="Active-set iterations over the run.")
    largest_iterations: int = Field(description="Most active-set iterations of one step.")
    corrected_target_steps: int = Field(
        description="Steps at which the setpoint was out of reach inside the input limits, so that the "
        "controller aimed at the nearest reachable steady state."
    )
    largest_output_slack: float | None = Field(
        description="The largest slack used on any soft output limit, in scaled units (slack divided by the "
        "output's span, comparable across outputs); null without soft output limits."
    )


class OutputZone(RequestModel):
    """A range for one controlled output instead of a setpoint (for example a level between 30 and 70 %).

    Inside its zone the output floats freely: it has no setpoint weight (its entry of
    weights.output must be 0, so the unconstrained gains do not act on it). Outside, the move QP
    of /simulate weights its distance to the nearest edge by ``weight`` at every penalized step,
    as an output of that weight tracking the edge; the output's setpoint has no effect.
    """

    low: FiniteFloat | None = Field(
        default=None,
        description="Lower edge, engineering units (absolute with model.operating_point); null: open below.",
    )
    high: FiniteFloat | None = Field(
        default=None,
        description="Upper edge, engineering units (absolute with model.operating_point); null: open above.",
    )
    weight: Annotated[FiniteFloat, Field(gt=0, le=MAX_ZONE_WEIGHT)] = Field(
        default=1.0,
        description="Weight of the distance outside the zone, in the units of weights.output (per scaled "
        "output squared); default 1.",
    )


class ZoneReport(ResponseModel):
    """One zone output as the design treats it."""

    output: str = Field(description="Tag of the controlled output.")
    low: float | None = Field(description="Lower edge, engineering units; null: open below.")
    high: float | None = Field(description="Upper edge, engineering units; null: open above.")
    weight: float = Field(description="Weight outside the zone (the move QP's).")
    weight_in_gains: float = Field(
        description="The output's weight in the unconstrained gains: always 0, so gain.* do not act on it."
    )


class ZoneRunReport(ZoneReport):
    """How one zone output did over the run."""

    ended_inside: bool = Field(description="The last sample lies inside the zone (to 1e-6 relative).")
    fraction_inside: float = Field(description="Share of the samples inside the zone.")
    largest_excursion: float = Field(description="Largest distance outside the zone, engineering units.")
    first_outside: int | None = Field(description="First step outside the zone; null: never.")
