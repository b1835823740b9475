"""From checked limits to the solver's pieces, and from their results to the response.

/design: :func:`design_limit_check` runs the design's fixed law on the nominal model for the
nominal setpoint step (``service.solver.limits.limited_run``) and :func:`limit_check_report` says
which limits it breaks.  /simulate: :func:`limited_run` builds the move QP policy
(``service.solver.limits.policy``) and the reachable-target rule on the design's scaled
signals; :func:`limit_run_reports` turns the run's step reports into the compact per-step
list, the summary and the warnings, back in engineering units.

Units.  The run is in scaled signals (``u / span``, ``z / span``; see
``service.pipeline.simulate``), so the limits are divided by the model's spans on the
way in and every limit, slack and target is multiplied back on the way out.  The check of
/design runs in engineering units with the unscaled gains (the same law after a change of
units).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.errors import NumericalError
from service.pipeline.limits_checks import LimitInputs
from service.pipeline.plant import DiscretePlant
from service.pipeline.zones import ZoneInputs
from service.schemas.design import WarningReport
from service.schemas.limits import (
    ActiveLimitReport,
    LimitCheckReport,
    LimitExcursionReport,
    LimitRunReport,
    LimitSignalSummary,
    LimitStepReport,
    LimitSummary,
)
from service.solver.design.closed_loop import Diagnostic
from service.solver.design.controller import ControllerDesign
from service.solver.design.gain import PredictiveGain
from service.solver.estimation.loop import ControlLoop
from service.solver.evaluation.simulation import Simulation
from service.solver.limits.bounds import Limits
from service.solver.limits.limited_run import (
    GainWhenFreePolicy,
    LimitExcursion,
    NominalRun,
    ReachableTargetRule,
    limit_excursions,
    nominal_setpoint_run,
)
from service.solver.limits.policy import ConstrainedPolicy, StepReport
from service.solver.limits.qp import MoveQP

__all__ = [
    "DesignLimitCheck",
    "LimitedRun",
    "design_limit_check",
    "limit_check_report",
    "limit_check_warnings",
    "limit_run_reports",
    "limited_run",
]


# --------------------------------------------------------------------------- /design


@dataclass(frozen=True)
class DesignLimitCheck:
    """The nominal setpoint step of the fixed law, held against the limits (engineering units)."""

    run: NominalRun
    excursions: tuple[LimitExcursion, ...]
    nominal_step: NDArray[np.float64]


def design_limit_check(
    limits: LimitInputs, plant: DiscretePlant, gain: PredictiveGain, *, prediction: int
) -> DesignLimitCheck:
    """Run the fixed law for the nominal setpoint step over ``prediction`` samples and find its excursions.

    Parameters
    ----------
    limits : LimitInputs
    plant : DiscretePlant
        The nominal model, engineering units.
    gain : PredictiveGain
        The design's gains in engineering units.
    prediction : int
        ``Hp``, the samples to run.
    """
    run = nominal_setpoint_run(plant.a, plant.b, plant.c, gain, setpoint=limits.nominal_step, steps=prediction)
    hard = limits.limits()
    excursions = limit_excursions(
        hard, inputs=run.inputs, previous_input=run.previous_input, outputs=run.outputs, first_output_step=1
    )
    return DesignLimitCheck(run=run, excursions=excursions, nominal_step=limits.nominal_step)


def _names(plant: DiscretePlant, kind: str) -> list[str]:
    return [s.name for s in (plant.outputs if kind == "output" else plant.inputs)]


def limit_check_report(check: DesignLimitCheck, plant: DiscretePlant) -> LimitCheckReport:
    """The response block of :func:`design_limit_check`."""
    return LimitCheckReport(
        violated=bool(check.excursions),
        violations=[
            LimitExcursionReport(
                kind=e.kind,
                side=e.side,
                signal=_names(plant, e.kind)[e.index],
                step=e.step,
                value=e.value,
                limit=e.limit,
            )
            for e in check.excursions
        ],
        nominal_step=check.nominal_step.tolist(),
        steps=int(check.run.inputs.shape[0]),
    )


def limit_check_warnings(check: DesignLimitCheck, plant: DiscretePlant) -> list[Diagnostic]:
    """One warning when the fixed law breaks a limit for the nominal step (none otherwise)."""
    if not check.excursions:
        return []
    broken = ", ".join(
        f"{e.kind}_{e.side} of {_names(plant, e.kind)[e.index]} (step {e.step})" for e in check.excursions[:5]
    )
    more = f" and {len(check.excursions) - 5} more" if len(check.excursions) > 5 else ""
    return [
        Diagnostic(
            "unconstrained_law_breaks_limits",
            f"For the nominal setpoint step the unconstrained law alone breaks {broken}{more}: under these "
            f"limits the controller will differ from its fixed gain (see limit_check; preview it with /simulate).",
        )
    ]


# --------------------------------------------------------------------------- /simulate


@dataclass(frozen=True)
class LimitedRun:
    """The pieces of a run under limits, in the design's scaled signals.

    Attributes
    ----------
    limits : Limits
        Scaled.
    policy : GainWhenFreePolicy
        The move QP (applying ``Kh E`` itself when no limit is in the way), the loop's move policy.
    target : ReachableTargetRule
        The loop's target rule (records each step's status).
    hard_outputs : bool
    first_penalized : int
        ``Hw``: the prediction step whose output limits a step row reports.
    """

    limits: Limits
    policy: GainWhenFreePolicy
    target: ReachableTargetRule
    hard_outputs: bool
    first_penalized: int


def limited_run(
    limits: LimitInputs,
    plant: DiscretePlant,
    design: ControllerDesign,
    loop: ControlLoop,
    *,
    zones: ZoneInputs | None = None,
    b_disturbance: NDArray[np.float64] | None = None,
) -> LimitedRun:
    """Set up the move QP and the reachable target of a run under ``limits`` (scaled by the model's spans).

    ``zones`` adds the zone outputs' slacks to the QP (``service.solver.limits.zones``); a run
    with zones and no limits passes :func:`service.pipeline.limits_checks.no_limits`.
    ``b_disturbance`` (the model's measured-disturbance matrix, in the loop's scaled signals)
    puts the held measured disturbances into the reachable target.

    With move blocking the QP's moves are the free (blocked) moves: the input is held between
    them, so its limits are met at each block's start and each free move is one move.

    Raises
    ------
    service.errors.NumericalError
        When the QP or the target calculation cannot be set up (pointer ``/limits``).
    """
    scaled = limits.limits(plant.input_spans, plant.output_spans)
    held = None if zones is None else zones.zones(plant.output_spans)
    try:
        if design.blocking is None:
            policy = ConstrainedPolicy.from_design(design, scaled, hard_outputs=limits.hard_outputs, zones=held)
        else:
            prediction = dataclasses.replace(design.prediction, control=len(design.blocking))
            qp = MoveQP(
                prediction=prediction,
                hessian=design.hessian,
                weighted=design.weighted,
                output_root=design.output_root,
                limits=scaled,
                input_pull=None if design.input_penalty is None else design.input_penalty.pull,
                terminal_rows=None
                if design.terminal is None
                else (design.terminal.weighted_moves, design.terminal.root),
                hard_outputs=limits.hard_outputs,
                zones=held,
            )
            policy = ConstrainedPolicy(qp, scaled)
        target = ReachableTargetRule.from_loop(loop, scaled, b_disturbance=b_disturbance)
        exact = GainWhenFreePolicy(
            policy, loop.horizon_gain, design.input_target_gain, None if loop.terminal is None else loop.terminal.gain
        )
    except (ValueError, ArithmeticError, np.linalg.LinAlgError) as exc:  # pragma: no cover - defensive
        raise NumericalError(f"The limits' QP could not be set up: {exc}", field=("limits",)) from exc
    return LimitedRun(
        limits=scaled,
        policy=exact,
        target=target,
        hard_outputs=limits.hard_outputs,
        first_penalized=design.prediction.first_penalized,
    )


def _shown(report: StepReport, first_penalized: int) -> list[tuple[str, str, int]]:
    """The active limits a step row shows: inputs and moves now, outputs at the first penalized step."""
    out = []
    for a in report.active_limits:
        now = a.step == (first_penalized if a.kind == "output" else 0)
        if now:
            out.append((a.kind, a.side, int(a.index)))
    return out


def _first_steps(steps: Sequence[int], most: int = 5) -> str:
    shown = ", ".join(str(k) for k in steps[:most])
    return shown + (", ..." if len(steps) > most else "")


def limit_run_reports(
    run: LimitedRun, sim: Simulation, rows: int, plant: DiscretePlant
) -> tuple[LimitRunReport, LimitSummary, list[WarningReport]]:
    """The per-step list, the summary and the warnings of a run under limits (engineering units).

    Parameters
    ----------
    run : LimitedRun
    sim : Simulation
        The run in scaled signals; ``sim.reports`` holds :func:`service.solver.limits.policy.step_report`
        dicts.
    rows : int
        Steps kept in the response (the run may have been cut where it blew up).
    plant : DiscretePlant
    """
    su, sz = plant.input_spans, plant.output_spans
    names = {"input": _names(plant, "input"), "move": _names(plant, "input"), "output": _names(plant, "output")}
    lim = run.limits
    statuses, reachable = run.target.statuses, run.target.reachable
    steps: list[LimitStepReport] = []
    counts: dict[tuple[str, str, int], int] = {}
    largest = {("output", side, j): 0.0 for side in ("min", "max") for j in range(lim.outputs)}
    fallbacks: dict[str, list[int]] = {}
    failed_targets: dict[str, list[int]] = {}
    corrected: list[int] = []
    iterations, most = 0, 0
    for k in range(rows):
        report = sim.reports[k]
        if report is None:
            continue
        assert isinstance(report, StepReport)
        shown = _shown(report, run.first_penalized)
        for key in shown:
            counts[key] = counts.get(key, 0) + 1
        upper, lower = report.output_max_slack, report.output_min_slack
        for j in range(lim.outputs):
            largest["output", "max", j] = max(largest["output", "max", j], float(upper[j]))
            largest["output", "min", j] = max(largest["output", "min", j], float(lower[j]))
        status = statuses[k] if k < len(statuses) else "unconstrained"
        moved = status != "unconstrained" and not (reachable[k] if k < len(reachable) else True)
        if status not in ("unconstrained", "optimal"):
            failed_targets.setdefault(status, []).append(k)
        if moved:
            corrected.append(k)
        if report.fallback:
            fallbacks.setdefault(report.status, []).append(k)
        iterations += report.iterations
        most = max(most, report.iterations)
        busy = report.method != "unconstrained" or bool(report.active_limits) or report.fallback
        if not (busy or upper.any() or lower.any() or moved):
            continue
        steps.append(
            LimitStepReport(
                step=k,
                status=report.status,
                iterations=report.iterations,
                fallback=report.fallback,
                active=[ActiveLimitReport(kind=kind, side=side, signal=names[kind][j]) for kind, side, j in shown],
                active_in_horizon=len(report.active_limits),
                output_max_slack=(upper * sz).tolist() if upper.any() else None,
                output_min_slack=(lower * sz).tolist() if lower.any() else None,
                target=(sim.targets[k] * sz).tolist() if moved else None,
            )
        )

    signals: list[LimitSignalSummary] = []
    bounds = (
        ("input", "min", lim.input_min, su),
        ("input", "max", lim.input_max, su),
        ("move", "min", lim.move_max, su),
        ("move", "max", lim.move_max, su),
        ("output", "min", lim.output_min, sz),
        ("output", "max", lim.output_max, sz),
    )
    for kind, side, values, spans in bounds:
        for j in np.flatnonzero(np.isfinite(values)).tolist():
            at = counts.get((kind, side, j), 0)
            soft = kind == "output" and not run.hard_outputs
            signals.append(
                LimitSignalSummary(
                    kind=kind,
                    side=side,
                    signal=names[kind][j],
                    limit=float(values[j] * spans[j]),
                    steps_at_limit=at,
                    fraction=at / max(rows, 1),
                    largest_slack=float(largest[kind, side, j] * spans[j]) if soft else None,
                )
            )
    soft_present = lim.has_output_limits and not run.hard_outputs
    summary = LimitSummary(
        signals=signals,
        fallbacks=sum(len(v) for v in fallbacks.values()),
        solver_iterations=iterations,
        largest_iterations=most,
        corrected_target_steps=len(corrected),
        largest_output_slack=max(largest.values(), default=0.0) if soft_present else None,
    )

    warnings: list[WarningReport] = []
    for status, steps_at in fallbacks.items():
        warnings.append(
            WarningReport(
                code="limits_fallback",
                message=f"At {len(steps_at)} step(s) ({_first_steps(steps_at)}) the move QP ended '{status}': each such step "
                f"held the last input (du = 0) and the run went on. See limits.steps (fallback true).",
            )
        )
    if corrected:
        warnings.append(
            WarningReport(
                code="setpoint_out_of_reach",
                message=f"At {len(corrected)} step(s) (from step {corrected[0]}) the setpoint was out of reach inside "
                f"the input limits: the controller aimed at the nearest reachable steady state instead "
                f"(limits.steps[].target), so it does not wind up against a limit.",
            )
        )
    for status, steps_at in failed_targets.items():
        warnings.append(
            WarningReport(
                code="target_calculation_failed",
                message=f"At {len(steps_at)} step(s) ({_first_steps(steps_at)}) the reachable steady-state target ended "
                f"'{status}': the controller aimed at the unconstrained target with its inputs clipped into the limits.",
            )
        )
    return LimitRunReport(steps=steps, hard_outputs=run.hard_outputs), summary, warnings
