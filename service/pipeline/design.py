"""From a validated /design request to solver arrays, and from the solver's result back.

Three steps, each reusable by the other endpoints: :func:`check_design_request` (every
check that needs several fields or the caps, the estimator's included), :func:`compute_design`
(scale, design, add feed-forward and plant facts and, when asked, the frequency analysis
with the estimator; arrays only) and :func:`design_response` (the JSON answer).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import NDArray

from service.errors import FieldProblem, InvalidRequest, NumericalError
from service.pipeline.estimator import EstimatorInputs, check_estimator, scaled_estimator
from service.pipeline.fingerprint import fingerprint
from service.pipeline.limits import (
    DesignLimitCheck,
    design_limit_check,
    limit_check_report,
    limit_check_warnings,
)
from service.pipeline.limits_checks import LimitInputs, check_limits
from service.pipeline.plant import DiscretePlant, Signal, plant_arrays
from service.pipeline.robustness import frequency_problems, robustness_report
from service.schemas.common import Caps, check_weight, pointer
from service.schemas.design import (
    ClosedLoopReport,
    DesignRequest,
    DesignResponse,
    GainLabels,
    GainReport,
    HessianReport,
    LabelledMatrix,
    PlantReport,
    PoleReport,
    SampledModelReport,
    SignalReport,
    WarningReport,
)
from service.solver.design.closed_loop import Diagnostic
from service.solver.design.controller import ControllerDesign, design_controller
from service.solver.design.feedforward import disturbance_free_response, feedforward_gain
from service.solver.design.gain import PredictiveGain
from service.solver.estimation.estimator import Estimator
from service.solver.evaluation.advice import merge_warnings, tuning_advice
from service.solver.evaluation.frequency import FrequencyAnalysis, design_frequency_analysis
from service.solver.evaluation.reach import dead_time_warnings
from service.solver.models.modes import uncontrollable_mode_warnings
from service.solver.models.properties import PlantProperties, plant_properties, plant_warnings
from service.solver.models.scaling import ScaledPlant, scale_plant, unscale_feedforward, unscale_gain

__all__ = [
    "DesignInputs",
    "DesignOutcome",
    "check_design_request",
    "compute_design",
    "design_response",
    "run_design",
]


@dataclass(frozen=True)
class DesignInputs:
    """A /design request after every check: arrays and integers for the solver."""

    plant: DiscretePlant
    output_weight: NDArray[np.float64]
    move_weight: NDArray[np.float64]
    prediction: int
    control: int
    first_penalized: int
    terminal: Literal["none", "riccati"] = "none"
    move_steps: tuple[int, ...] | None = None
    #: The checked estimator (of every request: /simulate runs with it).
    estimator: EstimatorInputs | None = None
    #: Grid size of the frequency analysis; ``None``: not asked.
    frequency_points: int | None = None
    #: The checked limits; ``None``: the request has none.
    limits: LimitInputs | None = None

    @property
    def free_moves(self) -> int:
        """Moves per input the optimizer chooses: Hu, or the number of blocking steps."""
        return self.control if self.move_steps is None else len(self.move_steps)


@dataclass(frozen=True)
class DesignOutcome:
    """What :func:`compute_design` computed.

    Attributes
    ----------
    scaled : ScaledPlant
        The plant in scaled signals, which the design used.
    design : ControllerDesign
        The design on the scaled plant (its gains are in scaled units).
    gain : PredictiveGain
        The gains in engineering units.
    feedforward : ndarray, shape (m, md), or None
        ``Kd`` in engineering units.
    properties : PlantProperties
        Of the scaled plant.
    warnings : list of Diagnostic
    estimator : Estimator or None
        On the scaled plant, when the frequency analysis was asked.
    analysis : FrequencyAnalysis or None
        Of the design with that estimator, in scaled signals.
    limit_check : DesignLimitCheck or None
        The unconstrained law against the request's limits, when it has limits.
    """

    scaled: ScaledPlant
    design: ControllerDesign
    gain: PredictiveGain
    feedforward: NDArray[np.float64] | None
    properties: PlantProperties
    warnings: list[Diagnostic]
    estimator: Estimator | None = None
    analysis: FrequencyAnalysis | None = None
    limit_check: DesignLimitCheck | None = None


def _horizon_problems(request: DesignRequest, caps: Caps) -> list[FieldProblem]:
    h = request.horizons
    problems: list[FieldProblem] = []
    if h.control > h.prediction:
        problems.append(
            FieldProblem(
                pointer("horizons", "control"),
                f"the control horizon ({h.control}) must not exceed the prediction horizon ({h.prediction})",
            )
        )
    if h.first_penalized > h.prediction:
        problems.append(
            FieldProblem(
                pointer("horizons", "first_penalized"),
                f"the first penalized step ({h.first_penalized}) must not exceed the prediction "
                f"horizon ({h.prediction})",
            )
        )
    if h.move_steps is not None:
        steps = h.move_steps
        if steps[0] != 0:
            problems.append(
                FieldProblem(
                    pointer("horizons", "move_steps", 0), "the first move step must be 0 (the move applied now)"
                )
            )
        for i in range(1, len(steps)):
            if steps[i] <= steps[i - 1]:
                problems.append(
                    FieldProblem(
                        pointer("horizons", "move_steps", i),
                        f"move steps must increase; {steps[i]} follows {steps[i - 1]}",
                    )
                )
        for i, step in enumerate(steps):
            if step >= h.control:
                problems.append(
                    FieldProblem(
                        pointer("horizons", "move_steps", i),
                        f"move step {step} is not inside the control horizon (steps 0 to {h.control - 1})",
                    )
                )
    if h.prediction > caps.max_prediction_horizon:
        problems.append(
            FieldProblem(
                pointer("horizons", "prediction"),
                f"the prediction horizon {h.prediction} exceeds this service's cap of "
                f"{caps.max_prediction_horizon} samples",
            )
        )
    return problems


def _size_problems(request: DesignRequest, plant: DiscretePlant, caps: Caps) -> list[FieldProblem]:
    h = request.horizons
    n, m, p = plant.states, plant.input_count, plant.output_count
    penalized = h.prediction - h.first_penalized + 1
    moves = h.control if h.move_steps is None else len(h.move_steps)
    hessian_size = moves * m
    if hessian_size > caps.max_hessian_size:
        return [
            FieldProblem(
                pointer("horizons", "control"),
                f"the Hessian would be {hessian_size} x {hessian_size} ({moves} moves x {m} inputs); "
                f"this service accepts at most {caps.max_hessian_size}",
            )
        ]
    entries = penalized * p * (n + m + h.control * m)
    if entries > caps.max_prediction_entries:
        return [
            FieldProblem(
                pointer("horizons", "prediction"),
                f"the prediction matrices would hold {entries:,} numbers; this service accepts at most "
                f"{caps.max_prediction_entries:,}. Shorten the prediction or control horizon",
            )
        ]
    if m * penalized * p > caps.max_response_entries:
        return [
            FieldProblem(
                pointer("horizons", "prediction"),
                f"the horizon gain would hold {m * penalized * p:,} numbers; this service returns at "
                f"most {caps.max_response_entries:,}",
            )
        ]
    return []


def check_design_request(request: DesignRequest, caps: Caps) -> DesignInputs:
    """Check everything the field types alone cannot: sizes that must agree, tags, and the caps.

    Raises
    ------
    InvalidRequest
        With one FieldProblem per broken rule, each naming its field by JSON pointer.
    service.errors.NumericalError
        When a continuous model cannot be sampled.
    """
    problems = _horizon_problems(request, caps)
    plant, found = plant_arrays(request.model, caps)
    problems += found
    if plant is None:
        raise InvalidRequest(problems)
    q, found = check_weight(
        request.weights.output,
        ("weights", "output"),
        size=plant.output_count,
        what="output weight",
        names=[sig.name for sig in plant.outputs],
    )
    problems += found
    r, found = check_weight(
        request.weights.move,
        ("weights", "move"),
        size=plant.input_count,
        what="move weight",
        names=[sig.name for sig in plant.inputs],
    )
    problems += found
    if q is not None and not np.any(q):
        problems.append(
            FieldProblem(
                pointer("weights", "output"),
                "every output weight is zero, so no output is controlled; give at least one a positive weight",
            )
        )
    estimator, found = check_estimator(request.estimator, plant)
    problems += found
    limits, found = check_limits(request.limits, plant)
    problems += found
    if request.analysis.frequency and not found:
        problems += frequency_problems(plant, estimator, points=request.analysis.points, caps=caps)
    if request.weights.terminal == "riccati" and plant.b_disturbance is not None:
        problems.append(
            FieldProblem(
                pointer("weights", "terminal"),
                "a Riccati terminal weight together with measured disturbances is not supported yet: the "
                "feed-forward gain would miss the terminal term. Leave out one of them",
            )
        )
    if not problems:
        problems += _size_problems(request, plant, caps)
    if problems:
        raise InvalidRequest(problems)
    assert q is not None and r is not None
    h = request.horizons
    return DesignInputs(
        plant=plant,
        output_weight=q,
        move_weight=r,
        prediction=h.prediction,
        control=h.control,
        first_penalized=h.first_penalized,
        terminal=request.weights.terminal,
        move_steps=None if h.move_steps is None else tuple(h.move_steps),
        estimator=estimator,
        frequency_points=request.analysis.points if request.analysis.frequency else None,
        limits=limits,
    )


def compute_design(inputs: DesignInputs) -> DesignOutcome:
    """Scale the plant, design on it, and return gains in engineering units with the plant's facts.

    Raises
    ------
    service.errors.NumericalError
        Also when the numbers leave double precision on the way (entries or spans near
        1e300): that is a problem of the request's units, never a silently wrong answer.
    """
    try:
        with np.errstate(over="raise", invalid="raise"):
            return _compute_design(inputs)
    except FloatingPointError:
        raise NumericalError(
            "The design overflows double precision: some entries of the model, weights or spans "
            "are too large (or too small) for their units. Express the signals in units where "
            "the numbers are moderate, or give spans.",
            pointer="/model",
        ) from None


def _compute_design(inputs: DesignInputs) -> DesignOutcome:
    plant = inputs.plant
    su, sz = plant.spans(plant.inputs), plant.spans(plant.outputs)
    sd = plant.spans(plant.disturbances) if plant.b_disturbance is not None else None
    scaled = scale_plant(
        plant.a, plant.b, plant.c, input_span=su, output_span=sz, b_disturbance=plant.b_disturbance, disturbance_span=sd
    )
    design = design_controller(
        scaled.a,
        scaled.b,
        scaled.c,
        output_weight=inputs.output_weight,
        move_weight=inputs.move_weight,
        prediction=inputs.prediction,
        control=inputs.control,
        first_penalized=inputs.first_penalized,
        input_labels=[s.name for s in plant.inputs],
        terminal=inputs.terminal,
        blocking=inputs.move_steps,
    )
    feedforward = None
    if scaled.b_disturbance is not None and sd is not None:
        fd = disturbance_free_response(
            scaled.a,
            scaled.b_disturbance,
            scaled.c,
            prediction=inputs.prediction,
            first_penalized=inputs.first_penalized,
        )
        feedforward = unscale_feedforward(feedforward_gain(design.gain.horizon, fd), input_span=su, disturbance_span=sd)
    estimator, analysis = None, None
    if inputs.frequency_points is not None:
        assert inputs.estimator is not None
        estimator = scaled_estimator(inputs.estimator, plant, scaled)
        analysis = design_frequency_analysis(
            design, estimator, sample_time=plant.sample_time, points=inputs.frequency_points
        )
    advice = tuning_advice(scaled.a, scaled.b, scaled.c, design, sample_time=plant.sample_time, analysis=analysis)
    properties = plant_properties(scaled.a, scaled.b, scaled.c)
    gain = unscale_gain(design.gain, input_span=su, output_span=sz)
    limit_check = None
    if inputs.limits is not None:
        limit_check = design_limit_check(inputs.limits, plant, gain, prediction=inputs.prediction)
    return DesignOutcome(
        scaled=scaled,
        design=design,
        gain=gain,
        feedforward=feedforward,
        properties=properties,
        warnings=[
            *dead_time_warnings(
                scaled.a,
                scaled.b,
                scaled.c,
                design,
                input_labels=[sig.name for sig in plant.inputs],
                output_labels=[sig.name for sig in plant.outputs],
            ),
            *merge_warnings(design.warnings, advice),
            # on the span-scaled signals when both lists have spans, else unit-free
            *plant_warnings(properties, balanced=not (bool(np.any(su != 1.0)) and bool(np.any(sz != 1.0)))),
            *uncontrollable_mode_warnings(scaled.a, scaled.b, labels=plant.state_labels, loop_poles=design.loop.poles),
            *([] if limit_check is None else limit_check_warnings(limit_check, plant)),
        ],
        estimator=estimator,
        analysis=analysis,
        limit_check=limit_check,
    )


def _optional(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def _labelled(values: NDArray[np.float64], rows: list[str], columns: list[str]) -> LabelledMatrix:
    return LabelledMatrix(rows=rows, columns=columns, values=[[_optional(v) for v in row] for row in values.tolist()])


def _signal_reports(signals: tuple[Signal, ...]) -> list[SignalReport]:
    return [SignalReport(name=s.name, unit=s.unit, span=s.span) for s in signals]


def _poles(values: NDArray[np.complex128]) -> list[PoleReport]:
    return [PoleReport(real=float(z.real), imag=float(z.imag)) for z in values]


def _plant_report(request: DesignRequest, plant: DiscretePlant, outcome: DesignOutcome) -> PlantReport:
    inputs = [s.name for s in plant.inputs]
    outputs = [s.name for s in plant.outputs]
    su, sz = plant.spans(plant.inputs), plant.spans(plant.outputs)
    steady = outcome.properties.steady_state
    to_engineering = sz[:, None] / su[None, :]
    rga = outcome.properties.relative_gain
    condition = outcome.properties.condition_number
    sampled = None
    if request.analysis.sampled_model:
        sampled = SampledModelReport(
            a=plant.a.tolist(),
            b=plant.b.tolist(),
            c=plant.c.tolist(),
            b_disturbance=None if plant.b_disturbance is None else plant.b_disturbance.tolist(),
            c_measured=plant.c_measured.tolist(),
            d_measured=plant.d_measured.tolist(),
        )
    return PlantReport(
        states=plant.states,
        sample_time=plant.sample_time,
        inputs=_signal_reports(plant.inputs),
        outputs=_signal_reports(plant.outputs),
        disturbances=_signal_reports(plant.disturbances),
        measured=_signal_reports(plant.measured),
        steady_state_gain=_labelled(steady.gain * to_engineering, outputs, inputs),
        ramp_rate=_labelled(steady.ramp_rate * to_engineering, outputs, inputs),
        relative_gain_array=None if rga is None else _labelled(rga, outputs, inputs),
        gain_condition_number=None if condition is None else _optional(condition),
        open_loop_poles=_poles(outcome.properties.poles),
        sampled_model=sampled,
        reduction=plant.reduction,
    )


def design_response(request: DesignRequest, inputs: DesignInputs, outcome: DesignOutcome) -> DesignResponse:
    """Turn the computed design into the response model."""
    plant = inputs.plant
    gain, design, loop = outcome.gain, outcome.design, outcome.design.loop
    names = [s.name for s in plant.inputs]
    outputs = [s.name for s in plant.outputs]
    steps = range(inputs.first_penalized, inputs.prediction + 1)
    labels = GainLabels(
        rows=names,
        horizon=[f"{name}(k+{i})" for i in steps for name in outputs],
        state=list(plant.state_labels),
        previous_input=names,
        setpoint=outputs,
        disturbance=[s.name for s in plant.disturbances],
    )
    return DesignResponse(
        gain=GainReport(
            horizon=gain.horizon.tolist(),
            state=gain.state.tolist(),
            previous_input=gain.previous_input.tolist(),
            setpoint=gain.setpoint.tolist(),
            disturbance=None if outcome.feedforward is None else outcome.feedforward.tolist(),
            labels=labels,
        ),
        hessian=HessianReport(
            condition_number=design.hessian.condition_number,
            smallest_eigenvalue=design.hessian.smallest_eigenvalue,
            largest_eigenvalue=design.hessian.largest_eigenvalue,
            size=design.hessian.matrix.shape[0],
        ),
        closed_loop=ClosedLoopReport(
            poles=_poles(loop.poles), spectral_radius=loop.spectral_radius, stable=loop.stable
        ),
        plant=_plant_report(request, plant, outcome),
        warnings=[WarningReport(code=w.code, message=w.message) for w in outcome.warnings],
        robustness=None
        if outcome.analysis is None or outcome.estimator is None
        else robustness_report(outcome.analysis, outcome.estimator),
        limit_check=None if outcome.limit_check is None else limit_check_report(outcome.limit_check, plant),
        fingerprint=fingerprint(request),
    )


def run_design(request: DesignRequest, caps: Caps) -> DesignResponse:
    """Check, design and report: the whole of POST /design without HTTP.

    Raises
    ------
    InvalidRequest, NumericalError
    """
    inputs = check_design_request(request, caps)
    return design_response(request, inputs, compute_design(inputs))
