"""Run a tuning sweep through the /design (and /simulate) pipeline, one retuning per value.

Each entry is what a separate call gives: the base design request with the value put in,
designed by the same functions as POST /design, or, with a ``scenario``, designed and
simulated by those of POST /simulate (the base design's estimator closing the loop).  The
base request is checked once (its model converted and sampled once, its true plant too);
each value only retunes those checked inputs (:func:`service.pipeline.design.retuned_inputs`:
horizons, weights and the sizes they set are checked again).  Whether the values fit the
parameter (horizons whole numbers >= 1, weights >= 0, ``signal`` for weights only) is the
schema's own rule (``service.schemas.sweep``).  The work caps hold for the sweep as a whole:
the values' frequency analyses together within ``max_frequency_work``, their runs together
within ``max_simulation_work``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace
from typing import TypeVar

import numpy as np

from service.errors import FieldKey, FieldProblem, InvalidRequest, NumericalError
from service.pipeline.caps import Caps, loop_frequency_work, plant_run_work
from service.pipeline.design import DesignInputs, DesignOutcome, check_design_request, compute_design, retuned_inputs
from service.pipeline.fingerprint import fingerprint
from service.pipeline.limits_checks import limit_work_problems
from service.pipeline.operating_point import check_operating_point, checked_at_point, to_deviations
from service.pipeline.problems import pointer, problem_of
from service.pipeline.robustness import not_finite_analysis
from service.pipeline.simulate import checked_simulation, compute_simulation, performance_report
from service.pipeline.simulate_checks import SimulationInputs
from service.schemas.design import DesignRequest, WarningReport
from service.schemas.simulate import PerformanceReport, ScenarioRequest, SimulateRequest
from service.schemas.sweep import HORIZON_PARAMETERS, SweepEntryReport, SweepProblem, SweepRequest, SweepResponse
from service.solver.evaluation.frequency import FrequencyAnalysis

__all__ = ["run_sweep", "simulate_request", "substituted_request"]

T = TypeVar("T")


WEIGHT_FIELDS = {"move_weight": "move", "output_weight": "output", "input_weight": "input"}


def _weight(
    weight: list[float] | list[list[float]], signal: int | None, value: float, size: int
) -> list[float] | list[list[float]]:
    if signal is None:
        return [value] * size
    if weight and isinstance(weight[0], list):
        matrix = [[float(x) for x in row] for row in weight if isinstance(row, list)]
        matrix[signal][signal] = value
        return matrix
    diagonal = [float(x) for x in weight if not isinstance(x, list)]
    diagonal[signal] = value
    return diagonal


def _base_weight(design: DesignRequest, field: str) -> list[float] | list[list[float]]:
    """The base request's weight ``field``; an absent input weight is zero on every input.

    ``weights.input`` absent and all zero mean the same (no input targets), so a sweep of one
    input's weight on such a base keeps the other inputs at 0.  The number of inputs is that
    of the move weight, one per manipulated variable (the base request is checked before).
    """
    weight: list[float] | list[list[float]] | None = getattr(design.weights, field)
    if weight is None:
        return [0.0] * len(design.weights.move)
    return weight


def substituted_request(request: SweepRequest, value: float) -> DesignRequest:
    """The base design request with the swept parameter set to ``value``.

    A weight sweep sets one diagonal entry (``signal``; a full matrix keeps its other entries)
    or every signal's weight (a diagonal); an absent ``weights.input`` is taken as zero on
    every input.  A horizon sweep sets the horizon (with move blocking, steps beyond a swept
    control horizon are dropped).
    """
    base = request.design
    if request.parameter in HORIZON_PARAMETERS:
        update: dict[str, object] = {request.parameter: int(value)}
        steps = base.horizons.move_steps
        if request.parameter == "control" and steps is not None:
            update["move_steps"] = [j for j in steps if j < int(value)] or [0]
        return base.model_copy(update={"horizons": base.horizons.model_copy(update=update)})
    field = WEIGHT_FIELDS[request.parameter]
    weight = _base_weight(base, field)
    updated = _weight(weight, request.signal, float(value), len(weight))
    return base.model_copy(update={"weights": base.weights.model_copy(update={field: updated})})


def _signal_problem(request: SweepRequest) -> list[FieldProblem]:
    if request.signal is None:
        return []
    field = WEIGHT_FIELDS[request.parameter]
    size = len(_base_weight(request.design, field))
    if request.signal >= size:
        has = (
            f"the plant has {size} manipulated variables"
            if field == "input" and request.design.weights.input is None
            else f"the {field} weight has {size} entries"
        )
        return [FieldProblem(pointer("signal"), f"signal {request.signal} does not exist: {has}")]
    return []


def simulate_request(design: DesignRequest, scenario: ScenarioRequest) -> SimulateRequest:
    """The /simulate request of a design request and a scenario."""
    fields = {name: getattr(design, name) for name in DesignRequest.model_fields}
    return SimulateRequest.model_validate({**fields, "scenario": scenario})


def _sweep_pointer(where: str) -> str:
    """Where a field of the substituted /design or /simulate request sits in the sweep request."""
    return where if where == "/scenario" or where.startswith("/scenario/") else "/design" + where


def _into_sweep(exc: InvalidRequest | NumericalError, *, unnamed: FieldKey = ()) -> InvalidRequest | NumericalError:
    """The same failure naming fields of the sweep request (``unnamed`` when it names none)."""
    if isinstance(exc, InvalidRequest):
        return InvalidRequest([FieldProblem(_sweep_pointer(p.pointer), p.detail) for p in exc.problems])
    if not exc.field:
        return type(exc)(exc.detail, field=unnamed)
    return type(exc)(exc.detail, field=exc.field if exc.field[0] == "scenario" else ("design", *exc.field))


def _in_sweep(check: Callable[[], T]) -> T:
    """Run a check of the base request, its problems pointing into the sweep request."""
    try:
        return check()
    except (InvalidRequest, NumericalError) as exc:
        raise _into_sweep(exc, unnamed=("design",)) from None


def _failed(request: SweepRequest, value: float, mark: str, exc: InvalidRequest | NumericalError) -> SweepEntryReport:
    problem = problem_of(_into_sweep(exc))
    if isinstance(exc, InvalidRequest):
        problem = problem.with_detail(f"The design with {request.parameter} = {value:g} is invalid.")
    return SweepEntryReport(value=value, status="failed", fingerprint=mark, problem=SweepProblem(**problem.brief()))


def _peak_sensitivity(analysis: FrequencyAnalysis) -> float:
    """The larger peak of S at the plant input and output, without building the whole report.

    Numbers that are not finite fail the entry with the report's own problem.
    """
    loops = (analysis.plant_input, analysis.plant_output)
    for loop in loops:
        arrays = (loop.sensitivity_singular_values, loop.complementary_singular_values)
        figures = (loop.peak_sensitivity, loop.peak_complementary)
        if not (all(np.all(np.isfinite(x)) for x in arrays) and np.all(np.isfinite(figures))):
            raise not_finite_analysis()
    return float(max(loop.peak_sensitivity for loop in loops))


def _entry(
    request: SweepRequest,
    value: float,
    base: DesignInputs,
    run: SimulationInputs | None,
    caps: Caps,
    *,
    deviations: SweepRequest,
) -> SweepEntryReport:
    """One value: the base's checked inputs retuned (the model is not converted again), designed, run.

    ``deviations`` is ``request`` with its operating point taken out (the same request without
    one); the fingerprint names the design as sent, as a separate /design call's would.
    """
    mark = fingerprint(substituted_request(request, value))
    performance: PerformanceReport | None = None
    peak: float | None = None
    try:
        inputs = retuned_inputs(base, substituted_request(deviations, value), caps, fingerprint=mark)
        outcome: DesignOutcome
        if run is None:
            outcome = compute_design(inputs)
        else:
            work = limit_work_problems(
                inputs.limits,
                steps=run.steps,
                free_moves=inputs.free_moves,
                penalized_steps=max(inputs.prediction - inputs.first_penalized + 1, 1),
                caps=caps,
            )
            if work:
                raise InvalidRequest(work)
            retuned_run = replace(run, design=inputs)
            simulation = compute_simulation(retuned_run)
            outcome = simulation.design
            performance = performance_report(inputs, simulation)
        if outcome.analysis is not None:
            peak = _peak_sensitivity(outcome.analysis)
    except (InvalidRequest, NumericalError) as exc:
        return _failed(request, value, mark, exc)
    loop = outcome.design.loop
    return SweepEntryReport(
        value=value,
        status="designed",
        fingerprint=mark,
        spectral_radius=loop.spectral_radius,
        stable=loop.stable,
        condition_number=outcome.design.hessian.condition_number,
        warnings=[WarningReport(code=w.code, message=w.message) for w in outcome.warnings],
        peak_sensitivity=peak,
        performance=performance,
    )


def _frequency_work_problems(request: SweepRequest, base: DesignInputs, caps: Caps) -> list[FieldProblem]:
    """The values' frequency analyses together (the loop's size does not depend on the tuning)."""
    if base.frequency_points is None or base.estimator is None:
        return []
    each = loop_frequency_work(base.plant, base.estimator, points=base.frequency_points)
    total = each * len(request.values)
    if total <= caps.max_frequency_work:
        return []
    most = max(caps.max_frequency_work // each, 1)
    return [
        FieldProblem(
            pointer("values"),
            f"{len(request.values)} frequency analyses of about {each:.2e} floating-point operations each "
            f"would take {total:.2e}; this service accepts at most {caps.max_frequency_work:.2e} for a sweep. "
            f"Sweep at most {most:,} values, or ask for fewer analysis points",
        )
    ]


def _run_work(request: SweepRequest, base: SimulationInputs, value: float) -> int:
    """The estimated work of the run with ``value`` (``service.pipeline.caps.plant_run_work``)."""
    h = substituted_request(request, value).horizons
    return plant_run_work(
        base.design.plant,
        true_plant=base.true_plant,
        disturbance=base.disturbance,
        steps=base.steps,
        penalized_steps=max(h.prediction - h.first_penalized + 1, 1),
    )


def _simulation_work_problems(request: SweepRequest, base: SimulationInputs, caps: Caps) -> list[FieldProblem]:
    """The values' runs together; a single run over the cap names the scenario's steps."""
    works = [_run_work(request, base, value) for value in request.values]
    total = sum(works)
    if total <= caps.max_simulation_work:
        return []
    largest = max(works)
    if largest > caps.max_simulation_work:
        value = request.values[works.index(largest)]
        return [
            FieldProblem(
                pointer("scenario", "steps"),
                f"the run with {request.parameter} = {value:g} alone would take about {largest:.2e} floating-point "
                f"operations; this service accepts at most {caps.max_simulation_work:.2e}. Simulate fewer steps",
            )
        ]
    return [
        FieldProblem(
            pointer("values"),
            f"{len(request.values)} runs would take about {total:.2e} floating-point operations together; this "
            f"service accepts at most {caps.max_simulation_work:.2e} for a sweep. Sweep fewer values, or "
            f"simulate fewer steps",
        )
    ]


def run_sweep(request: SweepRequest, caps: Caps) -> SweepResponse:
    """Design (and simulate) once per value; one failed value never fails the others.

    Raises
    ------
    InvalidRequest
        When the base request is invalid (pointers under ``/design``, or ``/scenario``) or the
        sweep itself is malformed (too many values, a signal that does not exist, more work
        than the caps allow).
    NumericalError
        When the base model cannot be sampled.
    """
    scenario = request.scenario
    base_run: SimulationInputs | None = None
    # With model.operating_point the base is checked and run in deviations from it, as /design
    # and /simulate do; every figure a sweep answers is a difference, free of the point.
    if scenario is None:
        design, point = to_deviations(request.design)
        base = _in_sweep(lambda: checked_at_point(lambda: check_design_request(design, caps), design, point, caps))
        if point is not None:
            at = point
            _in_sweep(lambda: check_operating_point(design, at, base.plant))
    else:
        # checked as /simulate checks the run (a true plant with an operating point of its own,
        # a run's measured outputs without operating_point.measured)
        run_request, point, base_run = _in_sweep(
            lambda: checked_simulation(simulate_request(request.design, scenario), caps)
        )
        design = DesignRequest.model_validate({name: getattr(run_request, name) for name in DesignRequest.model_fields})
        base = base_run.design
    deviations = request.model_copy(update={"design": design})
    problems = _signal_problem(request)
    if len(request.values) > caps.max_sweep_values:
        problems.append(
            FieldProblem(
                pointer("values"), f"{len(request.values)} values given; a sweep takes at most {caps.max_sweep_values}"
            )
        )
    elif not problems:
        problems += _frequency_work_problems(request, base, caps)
        if base_run is not None:
            problems += _simulation_work_problems(request, base_run, caps)
    if problems:
        raise InvalidRequest(problems)
    return SweepResponse(
        parameter=request.parameter,
        signal=request.signal,
        entries=[_entry(request, value, base, base_run, caps, deviations=deviations) for value in request.values],
    )
