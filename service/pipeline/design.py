"""From a validated /design request to solver arrays, and from the solver's result back.

Three steps, each reusable by the other endpoints: :func:`check_design_request` (every
check that needs several fields or the caps, the estimator's included), :func:`compute_design`
(scale, design, add feed-forward and plant facts and, when asked, the frequency analysis
with the estimator; arrays only) and :func:`design_response` (the JSON answer).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Literal

import numpy as np
from numpy.typing import NDArray

from service.errors import FieldProblem, InvalidRequest, NumericalError
from service.pipeline.arrays import check_weight
from service.pipeline.caps import Caps, hessian_size, horizon_gain_entries, prediction_entries
from service.pipeline.estimates import design_memory_bytes
from service.pipeline.estimator import EstimatorInputs, check_estimator, scaled_estimator, signal_sizes
from service.pipeline.fingerprint import design_fingerprint
from service.pipeline.limits import (
    DesignLimitCheck,
    design_limit_check,
    limit_check_report,
    limit_check_warnings,
)
from service.pipeline.limits_checks import LimitInputs, check_limits
from service.pipeline.model_error import ModelErrorInputs, check_model_error, compute_model_error, model_error_report
from service.pipeline.operating_point import check_operating_point, checked_at_point, design_to_absolute, to_deviations
from service.pipeline.plant import DiscretePlant, Signal, plant_arrays
from service.pipeline.problems import pointer
from service.pipeline.robustness import frequency_problems, robustness_report
from service.pipeline.zones import ZoneInputs, check_zones, zone_reports, zone_warnings
from service.schemas.design import (
    ClosedLoopReport,
    DesignRequest,
    DesignResponse,
    DiagnosticsReport,
    GainLabels,
    GainReport,
    HessianReport,
    LabelledMatrix,
    MarginalModeReport,
    PlantReport,
    PoleReport,
    SampledModelReport,
    SignalReport,
    WarningReport,
)
from service.solver.design.closed_loop import ILL_CONDITIONED, Diagnostic
from service.solver.design.controller import ControllerDesign, design_controller
from service.solver.design.feedforward import design_feedforward_gain
from service.solver.design.gain import PredictiveGain
from service.solver.design.marginal import MarginalMode, describe_signals
from service.solver.estimation.estimator import Estimator
from service.solver.estimation.setpoint_reach import setpoint_reach, setpoint_reach_warnings
from service.solver.evaluation.advice import merge_warnings, tuning_advice
from service.solver.evaluation.frequency import FrequencyAnalysis, design_frequency_analysis
from service.solver.evaluation.model_error import ModelErrorStudy
from service.solver.evaluation.reach import dead_time_warnings
from service.solver.models.modes import uncontrollable_mode_warnings
from service.solver.models.properties import PlantProperties, plant_properties, plant_warnings
from service.solver.models.scaling import ScaledPlant, scale_plant, unscale_feedforward, unscale_gain

__all__ = [
    "DesignInputs",
    "DesignJson",
    "DesignOutcome",
    "check_design_request",
    "compute_design",
    "design_response",
    "marginal_mode_reports",
    "retuned_inputs",
    "run_design",
    "run_design_json",
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
    #: ``S`` of the input targets (``weights.input``), as given; ``None``: none (or all zero).
    input_weight: NDArray[np.float64] | None = None
    #: The checked estimator (of every request: /simulate runs with it).
    estimator: EstimatorInputs | None = None
    #: Grid size of the frequency analysis; ``None``: not asked.
    frequency_points: int | None = None
    #: The checked limits; ``None``: the request has none.
    limits: LimitInputs | None = None
    #: The checked ``analysis.model_error``; ``None``: not asked.
    model_error: ModelErrorInputs | None = None
    #: The checked zones; ``None``: every output has a setpoint.
    zones: ZoneInputs | None = None
    #: Whether the answer shows the sampled model (``analysis.sampled_model``).
    sampled_model: bool = False
    #: The fingerprint of the design request (its design fields alone).
    fingerprint: str = ""

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
    model_error : ModelErrorStudy or None
        The loop on the perturbed models, when ``analysis.model_error`` was given.
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
    model_error: ModelErrorStudy | None = None


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
    size = hessian_size(moves=moves, inputs=m)
    if size > caps.max_hessian_size:
        return [
            FieldProblem(
                pointer("horizons", "control"),
                f"the Hessian would be {size} x {size} ({moves} moves x {m} inputs); "
                f"this service accepts at most {caps.max_hessian_size}",
            )
        ]
    entries = prediction_entries(penalized_steps=penalized, outputs=p, states=n, inputs=m, control=h.control)
    if entries > caps.max_prediction_entries:
        return [
            FieldProblem(
                pointer("horizons", "prediction"),
                f"the prediction matrices would hold {entries:,} numbers; this service accepts at most "
                f"{caps.max_prediction_entries:,}. Shorten the prediction or control horizon",
            )
        ]
    memory = design_memory_bytes(states=n, inputs=m, outputs=p, penalized_steps=penalized, control=h.control)
    if memory > caps.max_design_memory_bytes:
        mib = 1024 * 1024
        return [
            FieldProblem(
                pointer(*where),
                f"this design would need about {memory / mib:,.0f} MiB in the solver ({penalized} predicted steps "
                f"x {p} outputs, {h.control} moves x {m} inputs, {n} states); this service allows "
                f"{caps.max_design_memory_bytes / mib:,.0f} MiB. Shorten the control horizon first (memory grows "
                "with its square), then the prediction horizon",
            )
            for where in (("horizons", "control"), ("horizons", "prediction"))
        ]
    gain_entries = horizon_gain_entries(penalized_steps=penalized, outputs=p, inputs=m)
    if gain_entries > caps.max_response_entries:
        return [
            FieldProblem(
                pointer("horizons", "prediction"),
                f"the horizon gain would hold {gain_entries:,} numbers; this service returns at "
                f"most {caps.max_response_entries:,}",
            )
        ]
    return []


def _checked_weights(
    request: DesignRequest, plant: DiscretePlant
) -> tuple[NDArray[np.float64] | None, NDArray[np.float64] | None, ZoneInputs | None, list[FieldProblem]]:
    """The output and move weights as arrays, the zones (which need no output weight), and what is wrong."""
    q, problems = check_weight(
        request.weights.output,
        ("weights", "output"),
        size=plant.output_count,
        what="output weight",
        names=[sig.name for sig in plant.outputs],
    )
    r, found = check_weight(
        request.weights.move,
        ("weights", "move"),
        size=plant.input_count,
        what="move weight",
        names=[sig.name for sig in plant.inputs],
    )
    problems += found
    zones, found = check_zones(request.zones, plant, q)
    problems += found
    if zones is not None and request.weights.terminal == "riccati":
        problems.append(
            FieldProblem(
                pointer("weights", "terminal"),
                "a Riccati terminal weight together with zones is not supported: the terminal weight "
                "penalizes the last predicted state's distance from one steady state, which would pull the "
                "zone outputs to that steady state's values instead of letting them float inside their "
                "zones, and the zone outputs carry no output weight for the Riccati equation to see. Use "
                "terminal 'none' with zones",
            )
        )
    if q is not None and not np.any(q) and zones is None and not found:
        problems.append(
            FieldProblem(
                pointer("weights", "output"),
                "every output weight is zero, so no output is controlled; give at least one a positive weight",
            )
        )
    return q, r, zones, problems


def _checked_input_weight(
    request: DesignRequest, plant: DiscretePlant
) -> tuple[NDArray[np.float64] | None, list[FieldProblem]]:
    """``weights.input`` checked like the move weight; ``None`` when absent or all zero."""
    if request.weights.input is None:
        return None, []
    s_in, problems = check_weight(
        request.weights.input,
        ("weights", "input"),
        size=plant.input_count,
        what="input weight",
        names=[sig.name for sig in plant.inputs],
    )
    if s_in is not None and not np.any(s_in):
        s_in = None  # all zero: no input targets
    return s_in, problems


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
    if request.model.operating_point is not None:
        problems.append(
            FieldProblem(
                pointer("model", "operating_point"),
                "the design checks take deviations: the operating point must be taken out first "
                "(service.pipeline.operating_point.to_deviations), as every endpoint does",
            )
        )
    plant, found = plant_arrays(request.model, caps)
    problems += found
    if plant is None:
        raise InvalidRequest(problems)
    q, r, zones, found = _checked_weights(request, plant)
    problems += found
    s_in, found = _checked_input_weight(request, plant)
    problems += found
    estimator, found = check_estimator(request.estimator, plant)
    problems += found
    limits, found = check_limits(request.limits, plant)
    problems += found
    if request.analysis.frequency and not found:
        problems += frequency_problems(plant, estimator, points=request.analysis.points, caps=caps)
    model_error, found = check_model_error(request.analysis.model_error, plant, estimator, caps)
    problems += found
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
        input_weight=s_in,
        estimator=estimator,
        frequency_points=request.analysis.points if request.analysis.frequency else None,
        limits=limits,
        model_error=model_error,
        zones=zones,
        sampled_model=request.analysis.sampled_model,
        fingerprint=design_fingerprint(request),
    )


def retuned_inputs(inputs: DesignInputs, request: DesignRequest, caps: Caps, *, fingerprint: str) -> DesignInputs:
    """The checked inputs of ``request``, which differs from the request of ``inputs`` in its tuning only.

    Only the tuning is checked again (horizons, weights, and the sizes they set) against the
    plant and blocks of ``inputs``, which were checked once: the model is neither converted
    nor sampled again.  A sweep calls this once per value.

    Raises
    ------
    InvalidRequest
    """
    plant = inputs.plant
    problems = _horizon_problems(request, caps)
    q, r, zones, found = _checked_weights(request, plant)
    problems += found
    s_in, found = _checked_input_weight(request, plant)
    problems += found
    if not problems:
        problems += _size_problems(request, plant, caps)
    if problems:
        raise InvalidRequest(problems)
    assert q is not None and r is not None
    h = request.horizons
    return replace(
        inputs,
        output_weight=q,
        move_weight=r,
        input_weight=s_in,
        prediction=h.prediction,
        control=h.control,
        first_penalized=h.first_penalized,
        move_steps=None if h.move_steps is None else tuple(h.move_steps),
        zones=zones,
        fingerprint=fingerprint,
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
            outcome = _compute_design(inputs)
    except FloatingPointError:
        raise NumericalError(
            "The design overflows double precision: some entries of the model, weights or spans "
            "are too large (or too small) for their units. Express the signals in units where "
            "the numbers are moderate, or give spans.",
            field=("model",),
        ) from None
    hessian = outcome.design.hessian
    if not math.isfinite(hessian.condition_number):
        # l_max / l_min of finite ends past the largest double (a weight near 1e308): the
        # answer would hold an infinite condition number.
        raise NumericalError(
            f"The Hessian's eigenvalues run from {hessian.smallest_eigenvalue:.3g} to "
            f"{hessian.largest_eigenvalue:.3g}, so its condition number overflows double precision: "
            "some output or move weights are far too large for the others (near 1e308). Give the "
            "weights moderate values.",
            field=("weights",),
        )
    return outcome


def _compute_design(inputs: DesignInputs) -> DesignOutcome:
    plant = inputs.plant
    su, sz = plant.input_spans, plant.output_spans
    sd = plant.disturbance_spans if plant.b_disturbance is not None else None
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
        output_labels=[s.name for s in plant.outputs],
        state_labels=list(plant.state_labels),
        terminal=inputs.terminal,
        blocking=inputs.move_steps,
        zone_outputs=() if inputs.zones is None else inputs.zones.outputs,
        input_weight=inputs.input_weight,
        input_span=su,
    )
    feedforward = None
    if scaled.b_disturbance is not None and sd is not None:
        kd = design_feedforward_gain(design, scaled.a, scaled.b, scaled.c, scaled.b_disturbance)
        feedforward = unscale_feedforward(kd, input_span=su, disturbance_span=sd)
    estimator, analysis, model_error = None, None, None
    if inputs.frequency_points is not None or inputs.model_error is not None:
        assert inputs.estimator is not None
        estimator = scaled_estimator(inputs.estimator, plant, scaled)
    if inputs.frequency_points is not None:
        assert estimator is not None
        analysis = design_frequency_analysis(
            design, estimator, sample_time=plant.sample_time, points=inputs.frequency_points
        )
    if inputs.model_error is not None:
        assert estimator is not None
        model_error = compute_model_error(inputs.model_error, design, estimator, plant, scaled)
    properties = plant_properties(scaled.a, scaled.b, scaled.c)
    loop_sizes = None
    if analysis is not None:
        # the fragility verdict is judged in the signals' natural sizes (1 with spans), as the
        # default filter's noises are: a signal written in other units changes no verdict
        natural = signal_sizes(plant, scaled, measured=True)
        loop_sizes = (natural.inputs, natural.outputs)
    advice = tuning_advice(
        scaled.a,
        scaled.b,
        scaled.c,
        design,
        sample_time=plant.sample_time,
        analysis=analysis,
        poles=properties.poles,
        # the analysis breaks the loop at the measured outputs: the zone outputs when they are those
        floating_outputs=() if inputs.zones is None or plant.measured_own else inputs.zones.outputs,
        output_labels=[s.name for s in plant.measured],
        loop_sizes=loop_sizes,
    )
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
            *plant_warnings(
                properties,
                balanced=not (bool(np.any(su != 1.0)) and bool(np.any(sz != 1.0))),
                output_labels=[sig.name for sig in plant.outputs],
            ),
            *setpoint_reach_warnings(
                setpoint_reach(scaled.a, scaled.b, scaled.c, design.output_weight),
                inputs=scaled.b.shape[1],
                weighted_labels=[
                    sig.name for sig, q in zip(plant.outputs, np.diag(design.output_weight), strict=True) if q > 0
                ],
            ),
            *uncontrollable_mode_warnings(
                scaled.a, scaled.b, labels=plant.state_labels, loop_poles=design.loop.poles, poles=properties.poles
            ),
            *([] if limit_check is None else limit_check_warnings(limit_check, plant)),
            *([] if inputs.zones is None else zone_warnings(inputs.zones, plant)),
        ],
        estimator=estimator,
        analysis=analysis,
        limit_check=limit_check,
        model_error=model_error,
    )


def _optional(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


def _labelled(values: NDArray[np.float64], rows: list[str], columns: list[str]) -> LabelledMatrix:
    return LabelledMatrix(rows=rows, columns=columns, values=[[_optional(v) for v in row] for row in values.tolist()])


def _signal_reports(signals: tuple[Signal, ...]) -> list[SignalReport]:
    return [SignalReport(name=s.name, unit=s.unit, span=s.span) for s in signals]


def _poles(values: NDArray[np.complex128]) -> list[PoleReport]:
    return [PoleReport(real=float(z.real), imag=float(z.imag)) for z in values]


def marginal_mode_reports(modes: Sequence[MarginalMode], plant: DiscretePlant) -> list[MarginalModeReport]:
    """The marginal modes of a closed loop, the signals named by their tags."""
    names = {
        "inputs": [s.name for s in plant.inputs],
        "outputs": [s.name for s in plant.outputs],
        "states": list(plant.state_labels),
    }
    return [
        MarginalModeReport(
            pole=PoleReport(real=float(mode.pole.real), imag=float(mode.pole.imag)),
            cause=mode.cause,  # type: ignore[arg-type]
            signals=describe_signals(mode, **names),
            direction=None if mode.direction is None else [float(v) for v in mode.direction],
        )
        for mode in modes
    ]


def _plant_report(checked: DesignInputs, plant: DiscretePlant, outcome: DesignOutcome) -> PlantReport:
    inputs = [s.name for s in plant.inputs]
    outputs = [s.name for s in plant.outputs]
    su, sz = plant.input_spans, plant.output_spans
    steady = outcome.properties.steady_state
    to_engineering = sz[:, None] / su[None, :]
    rga = outcome.properties.relative_gain
    condition = outcome.properties.condition_number
    balanced = outcome.properties.balanced_condition_number
    sampled = None
    if checked.sampled_model:
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
        balanced_gain_condition_number=None if balanced is None else _optional(balanced),
        open_loop_poles=_poles(outcome.properties.poles),
        sampled_model=sampled,
        reduction=plant.reduction,
    )


def _diagnostics(inputs: DesignInputs, outcome: DesignOutcome) -> DiagnosticsReport:
    """The names of the diagnostics this answer holds; none is skipped by a work budget today."""
    plant = inputs.plant
    computed = ["hessian_eigenvalues", "closed_loop_poles", "open_loop_poles", "steady_state_gain"]
    if outcome.properties.relative_gain is not None:
        computed.append("relative_gain_array")
    if outcome.design.hessian.condition_number > ILL_CONDITIONED:
        computed.append("hessian_what_if")
    computed.append("slow_pole")
    if plant.input_count == plant.output_count:
        computed.append("transmission_zeros")
    computed.append("uncontrollable_modes")
    if outcome.analysis is not None:
        computed.append("frequency_analysis")
    if outcome.limit_check is not None:
        computed.append("limit_check")
    if outcome.model_error is not None:
        computed.append("model_error")
    return DiagnosticsReport(
        computed=computed, hessian_eigenvalue_method=outcome.design.hessian.eigenvalue_method, skipped=[]
    )


def design_response(inputs: DesignInputs, outcome: DesignOutcome) -> DesignResponse:
    """Turn the computed design into the response model (the checked inputs carry all it needs)."""
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
        input_target=[f"{name}.target" for name in names] if gain.input_target is not None else [],
    )
    return DesignResponse(
        gain=GainReport(
            horizon=gain.horizon.tolist(),
            state=gain.state.tolist(),
            previous_input=gain.previous_input.tolist(),
            setpoint=gain.setpoint.tolist(),
            disturbance=None if outcome.feedforward is None else outcome.feedforward.tolist(),
            input_target=None if gain.input_target is None else gain.input_target.tolist(),
            labels=labels,
        ),
        hessian=HessianReport(
            condition_number=design.hessian.condition_number,
            smallest_eigenvalue=design.hessian.smallest_eigenvalue,
            largest_eigenvalue=design.hessian.largest_eigenvalue,
            size=design.hessian.matrix.shape[0],
        ),
        closed_loop=ClosedLoopReport(
            poles=_poles(loop.poles),
            spectral_radius=loop.spectral_radius,
            stable=loop.stable,
            marginal_modes=marginal_mode_reports(loop.marginal, plant),
        ),
        plant=_plant_report(inputs, plant, outcome),
        warnings=[WarningReport(code=w.code, message=w.message) for w in outcome.warnings],
        robustness=None
        if outcome.analysis is None or outcome.estimator is None
        else robustness_report(outcome.analysis, outcome.estimator, plant),
        limit_check=None if outcome.limit_check is None else limit_check_report(outcome.limit_check, plant),
        model_error=None
        if outcome.model_error is None or outcome.estimator is None
        else model_error_report(outcome.model_error, outcome.estimator),
        zones=None if inputs.zones is None else zone_reports(inputs.zones, plant),
        diagnostics=_diagnostics(inputs, outcome),
        fingerprint=inputs.fingerprint,
    )


def run_design(request: DesignRequest, caps: Caps) -> DesignResponse:
    """Check, design and report: the whole of POST /design without HTTP.

    Raises
    ------
    InvalidRequest, NumericalError
    """
    deviations, point = to_deviations(request)
    inputs = checked_at_point(lambda: check_design_request(deviations, caps), deviations, point, caps)
    if point is None:
        return design_response(inputs, compute_design(inputs))
    check_operating_point(deviations, point, inputs.plant)
    # The fingerprint names the request as sent, in absolute units.
    inputs = replace(inputs, fingerprint=design_fingerprint(request))
    response = design_response(inputs, compute_design(inputs))
    design_to_absolute(response, point, inputs.plant)
    return response


@dataclass(frozen=True)
class DesignJson:
    """A /design answer already written as JSON, with the sizes the metrics record.

    Attributes
    ----------
    body : bytes
        ``DesignResponse.model_dump_json()``: what the endpoint answers, written by
        pydantic-core in the solver process, so the serving process neither unpickles the
        response model nor validates and serializes it again.
    sizes : dict of str to int
        ``states``, ``inputs``, ``outputs`` and ``hessian`` of the design.
    """

    body: bytes
    sizes: dict[str, int]


def run_design_json(request: DesignRequest, caps: Caps) -> DesignJson:
    """:func:`run_design`, answered as JSON bytes (the same numbers as the response model).

    Raises
    ------
    InvalidRequest, NumericalError
    """
    response = run_design(request, caps)
    state, setpoint = response.gain.state, response.gain.setpoint
    sizes = {
        "states": len(state[0]) if state else 0,
        "inputs": len(state),
        "outputs": len(setpoint[0]) if setpoint else 0,
        "hessian": response.hessian.size,
    }
    return DesignJson(body=response.model_dump_json().encode("utf-8"), sizes=sizes)
