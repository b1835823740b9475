"""From a validated /simulate request to a simulated run, and from the run back to JSON or CSV.

Three steps, as for /design: :func:`service.pipeline.simulate_checks.check_simulate_request`
(every check that needs several fields or the caps), :func:`compute_simulation` (scale,
design, estimate, simulate; arrays only) and :func:`simulate_response`; :func:`run_simulation`
chains them and :func:`simulation_csv` writes the time series of a response as CSV.

Units.  The design is made on the plant in scaled signals (``u / span``, ``z / span``, see
``service.solver.models.scaling``); so are the estimator and the run.  Everything a request gives
in engineering units is scaled on the way in with the *model's* spans — the true plant,
setpoints, disturbance levels, noise spreads, the initial input and setpoint, the limits
(``service.pipeline.limits``), the covariances of the output and input disturbances
and of the measurement noise — and every
series and figure is unscaled on the way out.  The state is never scaled, so the process
noise covariance and the initial state go in as given.  With spans, a run is therefore the
same as the unscaled run with weights divided by span squared and the same covariances
(a change of units; tests/api/test_simulate_api.py).

Divergence.  JSON has no NaN or infinity.  When the run blows up (the solver stops it) or a
value overflows, every series is cut at the first step that is not finite, ``diverged_at``
says where, the figures of merit are null and a warning says so.
"""

from __future__ import annotations

import csv
import io
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.errors import NumericalError
from service.pipeline.caps import Caps
from service.pipeline.csv_cells import text_cell
from service.pipeline.design import DesignInputs, DesignOutcome, compute_design, design_response, marginal_mode_reports
from service.pipeline.estimator import disturbance_spans, scaled_estimator, scaled_measured, signal_sizes
from service.pipeline.fingerprint import design_fingerprint, fingerprint
from service.pipeline.limits import LimitedRun, limit_run_reports, limited_run
from service.pipeline.limits_checks import no_limits
from service.pipeline.operating_point import (
    OperatingPointValues,
    check_operating_point,
    checked_at_point,
    simulation_to_absolute,
    to_deviations,
)
from service.pipeline.plant import DiscretePlant
from service.pipeline.simulate_checks import SimulationInputs, check_simulate_request
from service.pipeline.zones import zone_run_reports
from service.schemas.design import ADVISORY, LabelledMatrix, PoleReport, WarningReport
from service.schemas.simulate import (
    EstimatorReport,
    InputFigures,
    OutputFigures,
    PerformanceReport,
    SeriesColumns,
    SimulateRequest,
    SimulateResponse,
    TrueLoopReport,
    WholeLoopReport,
)
from service.solver.design.marginal import MARGINAL_TOLERANCE
from service.solver.estimation.estimator import Estimator, unmeasured_outputs
from service.solver.estimation.loop import TrueLoop, WholeLoop, control_loop, true_loop, whole_loop
from service.solver.estimation.target import REACHABLE_TOLERANCE
from service.solver.evaluation.divergence import DIVERGENCE_LEVEL, divergence_onset
from service.solver.evaluation.performance import Performance, loop_performance
from service.solver.evaluation.simulation import Event, Scenario, Simulation, TruePlant, simulate_loop
from service.solver.models.scaling import scale_plant

__all__ = [
    "SimulationOutcome",
    "checked_simulation",
    "compute_simulation",
    "performance_report",
    "run_simulation",
    "run_simulation_answer",
    "simulate_response",
    "simulation_csv",
]


@dataclass(frozen=True)
class SimulationOutcome:
    """What :func:`compute_simulation` computed; series in engineering units.

    Attributes
    ----------
    design : DesignOutcome
    estimator : Estimator
        On the scaled plant.
    estimator_gain : ndarray, shape (na, p), or None
        ``L`` in engineering units (``None`` for ``full_state``).
    whole : WholeLoop
    simulation : Simulation
        As the solver returned it (scaled signals).
    rows : int
        Rows kept: ``steps``, or the first step that is not finite.
    time, outputs, measured, setpoints, inputs, estimates, measured_disturbances : ndarray
        The kept rows, engineering units.
    performance : Performance or None
        ``None`` when the run blew up.
    limited : LimitedRun or None
        The move QP and target rule of a run under limits (``None`` without limits or zones).
    """

    design: DesignOutcome
    estimator: Estimator
    estimator_gain: NDArray[np.float64] | None
    whole: WholeLoop
    simulation: Simulation
    rows: int
    time: NDArray[np.float64]
    outputs: NDArray[np.float64]
    measured: NDArray[np.float64]
    setpoints: NDArray[np.float64]
    inputs: NDArray[np.float64]
    estimates: NDArray[np.float64]
    measured_disturbances: NDArray[np.float64]
    performance: Performance | None
    limited: LimitedRun | None = None
    #: The loop analysed on the true plant, when the scenario has one.
    true: TrueLoop | None = None
    #: The step from which the run grows without bound and its growth per sample, if it does.
    diverging: tuple[int, float] | None = None


# --------------------------------------------------------------------------- compute


#: The largest entry of the loop on a true plant whose poles double precision can compute: the
#: square root of the largest double (about 1.3e154), past which products of two entries overflow.
_LARGEST_LOOP_ENTRY = float(np.sqrt(np.finfo(float).max))


def _scaled_events(events: list[Event], span: NDArray[np.float64]) -> list[Event]:
    return [Event(e.step, e.value / span) for e in events]


def _first_bad_row(*series: NDArray[np.float64]) -> int:
    """Index of the first row with a value that is not finite (the row count when none)."""
    rows = series[0].shape[0]
    bad = np.zeros(rows, dtype=bool)
    for s in series:
        if s.shape[1]:
            bad |= ~np.all(np.isfinite(s), axis=1)
    hits = np.nonzero(bad)[0]
    return int(hits[0]) if hits.size else rows


def compute_simulation(inputs: SimulationInputs) -> SimulationOutcome:
    """Design, estimate and simulate in scaled signals; return the run in engineering units.

    Raises
    ------
    service.errors.NumericalError
        From the design, or from the estimator (an undetectable disturbance model, a Riccati
        equation without a stabilizing solution).
    """
    plant = inputs.design.plant
    outcome = compute_design(inputs.design)
    scaled = outcome.scaled
    su, sz, sy = plant.input_spans, plant.output_spans, plant.measured_spans
    sd = plant.disturbance_spans if plant.b_disturbance is not None else np.ones(0)
    s_dist = disturbance_spans(plant, inputs.disturbance)
    estimator = outcome.estimator  # already built when the design's frequency analysis was asked
    if estimator is None:
        assert inputs.design.estimator is not None
        estimator = scaled_estimator(inputs.design.estimator, plant, scaled)
    loop = control_loop(outcome.design, estimator)
    whole = whole_loop(loop)
    if not np.all(np.isfinite(whole.poles)):
        raise NumericalError(
            "The poles of the whole loop are not finite numbers: the model's numbers are too large or "
            "too small for the loop's eigenvalues in double precision. Rescale the model",
            field=("model",),
        )

    true_plant, true = None, None
    if inputs.true_plant is not None:
        t = inputs.true_plant
        ts = scale_plant(
            t.a,
            t.b,
            t.c,
            input_span=su,
            output_span=sz,
            b_disturbance=t.b_disturbance,
            disturbance_span=sd if sd.size else None,
        )
        cm, dm = scaled_measured(plant, t.c_measured, t.d_measured)
        true_plant = TruePlant(ts.a, ts.b, ts.c, ts.b_disturbance, c_measured=cm, d_measured=dm)
        try:
            with np.errstate(over="raise", invalid="raise"):
                true = true_loop(loop, ts.a, ts.b, cm)  # the estimator reads the true plant's measured outputs
        except FloatingPointError:
            true = None
        # Past the square root of the largest double, products of two entries of the loop's
        # matrix overflow and its eigenvalues are noise: an entry of 1e308 gave a loop "stable"
        # with a spectral radius of 3e-17 while the run blew up at its first step.
        if true is None or not np.all(np.isfinite(true.poles)) or np.abs(true.matrix).max() > _LARGEST_LOOP_ENTRY:
            raise NumericalError(
                "The loop on the true plant overflows double precision: some entries of the true plant "
                "are too large (or too small) for the model's units, so its poles cannot be computed. "
                "Express the true plant in the model's units, with moderate numbers",
                field=("scenario", "true_plant"),
            )
    elif plant.measured_own:  # the model itself, with its own measured outputs (full_state records them)
        cm, dm = scaled_measured(plant)
        true_plant = TruePlant(scaled.a, scaled.b, scaled.c, scaled.b_disturbance, c_measured=cm, d_measured=dm)
    scenario = Scenario(
        steps=inputs.steps,
        setpoint_changes=_scaled_events(inputs.setpoints, sz),
        output_disturbances=_scaled_events(inputs.output_disturbances, sz),
        input_disturbances=_scaled_events(inputs.input_disturbances, su),
        measured_disturbances=_scaled_events(inputs.measured_disturbances, sd),
        noise_std=None if inputs.noise_std is None else inputs.noise_std / sy,
        seed=inputs.seed,
        initial_state=inputs.initial_state,
        initial_input=None if inputs.initial_input is None else inputs.initial_input / su,
        initial_setpoint=None if inputs.initial_setpoint is None else inputs.initial_setpoint / sz,
        input_targets=None if inputs.input_targets is None else inputs.input_targets / su,
        input_target_changes=_scaled_events(list(inputs.input_target_changes), su),
        sample_time=plant.sample_time,
    )
    limits, zones = inputs.design.limits, inputs.design.zones
    limited = None
    if limits is not None or zones is not None:  # zones alone also need the QP: it holds them
        limited = limited_run(
            limits or no_limits(plant), plant, outcome.design, loop, zones=zones, b_disturbance=scaled.b_disturbance
        )
    with np.errstate(over="ignore", invalid="ignore"):  # absurd levels overflow: the series are cut below
        sim = simulate_loop(
            outcome.design,
            estimator,
            scenario,
            plant=true_plant,
            loop=loop,
            b_disturbance=scaled.b_disturbance,
            policy=None if limited is None else limited.policy,
            target_rule=None if limited is None else limited.target,
        )

    n = estimator.state_size
    estimate_span = np.concatenate([np.ones(n), s_dist if estimator.disturbance_size else np.ones(0)])
    with np.errstate(over="ignore", invalid="ignore"):  # an overflow here is cut off just below
        outputs, measured, setpoints = sim.outputs * sz, sim.measured * sy, sim.setpoints * sz
        inputs_eng, estimates = sim.inputs * su, sim.estimates * estimate_span
        dm = sim.measured_disturbances * sd if sd.size else np.zeros((inputs.steps, 0))
    rows = _first_bad_row(sim.time[:, None], outputs, measured, setpoints, inputs_eng, estimates, dm)
    # Divergence is judged in spans, and a signal without a span in its natural size (the
    # step-response equilibration of the estimator's defaults): in engineering units a flow in
    # kg/h moving 8000 for a setpoint step of 1 degC is no sign of growth without bound.
    natural = signal_sizes(plant, scaled, measured=False)
    ny, nu = natural.outputs, natural.inputs
    sizes = [np.abs(e.value / ny).max(initial=0.0) for e in (*scenario.setpoint_changes, *scenario.output_disturbances)]
    sizes += [np.abs(e.value / nu).max(initial=0.0) for e in scenario.input_disturbances]
    sizes += [np.abs(e.value).max(initial=0.0) for e in scenario.measured_disturbances]
    for start, size in ((scenario.initial_input, nu), (scenario.initial_setpoint, ny)):
        if start is not None:
            sizes.append(float(np.abs(start / size).max(initial=0.0)))
    diverging = divergence_onset(
        np.hstack([sim.outputs[:rows] / ny, sim.inputs[:rows] / nu]), reference=max([1.0, *sizes])
    )
    performance = None
    if rows == inputs.steps:
        performance = loop_performance(
            sim.time,
            outputs,
            setpoints,
            inputs_eng,
            initial_input=sim.initial_input * su,
            initial_setpoint=sim.initial_setpoint * sz,
        )
    gain = None
    if not estimator.full_state:
        gain = estimate_span[:, None] * estimator.gain / sy[None, :]
    return SimulationOutcome(
        design=outcome,
        estimator=estimator,
        estimator_gain=gain,
        whole=whole,
        simulation=sim,
        rows=rows,
        time=sim.time[:rows],
        outputs=outputs[:rows],
        measured=measured[:rows],
        setpoints=setpoints[:rows],
        inputs=inputs_eng[:rows],
        estimates=estimates[:rows],
        measured_disturbances=dm[:rows],
        performance=performance,
        limited=limited,
        true=true,
        diverging=diverging,
    )


# --------------------------------------------------------------------------- response


def _unique(names: list[str]) -> list[str]:
    """Make column names unique by numbering repeats (``name``, ``name#2``, ...)."""
    seen: dict[str, int] = {}
    out = []
    for name in names:
        count = seen.get(name, 0) + 1
        seen[name] = count
        out.append(name if count == 1 else f"{name}#{count}")
    return out


def _columns(plant: DiscretePlant, estimator: Estimator) -> SeriesColumns:
    outputs = [s.name for s in plant.outputs]
    inputs = [s.name for s in plant.inputs]
    setpoints = [f"{name}.setpoint" for name in outputs]
    if plant.measured_own:  # measured outputs of their own: their tags (suffixed where a name is taken)
        own = [s.name for s in plant.measured]
        taken = set(outputs) | set(setpoints) | set(inputs)
        measured = [f"{name}.measured" if name in taken else name for name in own]
    else:
        own = outputs
        measured = [f"{name}.measured" for name in outputs]
    clash = set(outputs) | set(setpoints) | set(measured)
    inputs = [f"{name}.input" if name in clash else name for name in inputs]
    named = _unique([*outputs, *setpoints, *inputs, *measured])
    p, m = len(outputs), len(inputs)
    if estimator.disturbance == "per_output":
        disturbances = [f"{name}.{kind}_disturbance" for name, kind in zip(own, estimator.disturbances, strict=True)]
    else:
        source = {"output": own, "input": [s.name for s in plant.inputs], "none": []}[estimator.disturbance]
        disturbances = [f"{name}.{estimator.disturbance}_disturbance" for name in source]
    return SeriesColumns(
        outputs=named[:p],
        setpoints=named[p : 2 * p],
        inputs=named[2 * p : 2 * p + m],
        measured=named[2 * p + m :],
        estimates=[*plant.state_labels, *disturbances],
        measured_disturbances=[s.name for s in plant.disturbances],
        measured_own=plant.measured_own,
    )


def _poles(values: NDArray[np.complex128]) -> list[PoleReport]:
    return [PoleReport(real=float(z.real), imag=float(z.imag)) for z in values]


def _optional(value: float | None) -> float | None:
    return None if value is None or not np.isfinite(value) else float(value)


def performance_report(design: DesignInputs, outcome: SimulationOutcome) -> PerformanceReport:
    """The figures of merit of a run, named by the plant's tags (null where the run blew up).

    A zone output is held in its range, not at a setpoint: its setpoint figures are null and
    ``zone`` is true (the answer's ``zones`` says how it kept to its range).
    """
    plant = design.plant
    zone_outputs = () if design.zones is None else design.zones.outputs
    figures = outcome.performance
    outputs, inputs = [], []
    for i, signal in enumerate(plant.outputs):
        f = figures.outputs[i] if figures is not None and i not in zone_outputs else None
        outputs.append(
            OutputFigures(
                name=signal.name,
                zone=i in zone_outputs,
                step=None if f is None else f.step,
                rise_time=None if f is None else _optional(f.rise_time),
                settling_time=None if f is None else _optional(f.settling_time),
                overshoot_percent=None if f is None else _optional(f.overshoot),
                integral_absolute_error=None if f is None else _optional(f.integral_absolute_error),
                final_offset=None if f is None else _optional(f.final_offset),
            )
        )
    for j, signal in enumerate(plant.inputs):
        g = figures.inputs[j] if figures is not None else None
        inputs.append(
            InputFigures(
                name=signal.name,
                total_move=None if g is None else _optional(g.total_move),
                largest_move=None if g is None else _optional(g.largest_move),
            )
        )
    return PerformanceReport(outputs=outputs, inputs=inputs)


def _warnings(inputs: SimulationInputs, outcome: SimulationOutcome) -> list[WarningReport]:
    out: list[WarningReport] = []
    whole = outcome.whole
    if whole.unstable:
        out.append(
            WarningReport(
                code="whole_loop_unstable",
                message=f"The loop of controller, estimator and model is unstable (spectral radius "
                f"{whole.spectral_radius:.6g}): the run grows without bound even on the model itself.",
            )
        )
    if not whole.separation_holds:
        out.append(
            WarningReport(
                code="separation_check_failed",
                message=f"The whole loop's poles differ from the union of controller and estimator poles by "
                f"{whole.separation_error:.3g}: the eigenvalues are ill-conditioned, so treat every pole with care.",
            )
        )
    if outcome.true is not None and outcome.true.unstable:
        # Detuning robustifies a loop around a stable plant; around an unstable one, heavier move
        # weights bring a finite-horizon law nearer to the unstable open loop (see
        # service.solver.design.closed_loop.design_warnings).
        plant_unstable = bool(np.any(np.abs(outcome.design.properties.poles) > 1.0 + MARGINAL_TOLERANCE))
        remedy = (
            "or, the model being open-loop unstable, lengthen the horizons (raising the move weights would "
            "bring the loop nearer to the unstable open loop)"
            if plant_unstable
            else "or detune (raise the move weights)"
        )
        out.append(
            WarningReport(
                code="true_loop_unstable",
                message=f"On the true plant the loop of this controller and estimator is unstable (spectral "
                f"radius {outcome.true.spectral_radius:.6g}), although they were designed on the model: the "
                f"tuning does not tolerate this model error. Check the model against the true plant (gain "
                f"signs, dead times), {remedy}, and check analysis.model_error.",
            )
        )
    if outcome.diverging is not None and outcome.rows == inputs.steps:
        step, rate = outcome.diverging
        out.append(
            WarningReport(
                code="run_diverging",
                message=f"The run grows without bound: from step {step} its outputs and inputs are more than "
                f"{DIVERGENCE_LEVEL:.0e} times the scenario's own size and still grow by a factor "
                f"{rate:.4g} per sample. The figures of merit describe a loop that is not under control.",
            )
        )
    if outcome.rows < inputs.steps:
        out.append(
            WarningReport(
                code="run_diverged",
                message=f"The run blew up: the series stop at step {outcome.rows} of {inputs.steps} and the "
                f"figures of merit are null. Check the true plant against the model, or detune the controller.",
            )
        )
    if outcome.estimator.full_state:
        out.append(
            WarningReport(
                code="no_disturbance_model",
                message="The full_state estimator reads the plant's states and models no disturbance: the loop is "
                "not offset-free, so an unmeasured disturbance or a model error (a true_plant that differs from "
                "the model) leaves a steady offset on the controlled outputs (final_offset shows it). Use an "
                "estimator that reads the outputs with a disturbance model (the default per_output) for "
                "offset-free control.",
            )
        )
    elif outcome.estimator.disturbance_size == 0:
        out.append(
            WarningReport(
                code="no_disturbance_model",
                message="The estimator models no disturbance (estimator.disturbance 'none'): the loop is not "
                "offset-free, so a constant disturbance or a model error leaves a steady offset on the controlled "
                "outputs (final_offset shows it). Use disturbance 'per_output' for offset-free control.",
            )
        )
    plant = inputs.design.plant
    if plant.measured_own and not outcome.estimator.full_state:
        hidden = unmeasured_outputs(plant.c, plant.c_measured)
        if np.any(hidden):
            names = ", ".join(repr(s.name) for s, h in zip(plant.outputs, hidden, strict=True) if h)
            out.append(
                WarningReport(
                    code="unmeasured_controlled_output",
                    message=f"{names} is no combination of the measured outputs: the estimator infers it from the "
                    f"model, so it is held offset-free only against model error that the disturbance model "
                    f"explains through the state (an input gain error with input_disturbance), not against a bias "
                    f"on the output itself. Check it on a true_plant, or measure it.",
                )
            )
    out += [WarningReport(code=d.code, message=d.message) for d in inputs.limit_warnings]
    out += _out_of_reach(outcome)
    return out


def _out_of_reach(outcome: SimulationOutcome) -> list[WarningReport]:
    """``setpoints_out_of_reach`` of /design, when this run's targets missed its setpoints.

    Only without limits and zones: under them the target rule's reports say it
    (``setpoint_out_of_reach``).  Judged on the weighted outputs, in the scaled signals, to
    :data:`service.solver.estimation.target.REACHABLE_TOLERANCE` of the setpoints' size.
    """
    reach = next((d for d in outcome.design.warnings if d.code == "setpoints_out_of_reach"), None)
    if reach is None or outcome.limited is not None:
        return []
    sim, rows = outcome.simulation, outcome.rows
    weighted = np.diag(outcome.design.design.output_weight) > 0
    setpoints = sim.setpoints[:rows][:, weighted]
    miss = np.abs(sim.targets[:rows][:, weighted] - setpoints).max(axis=1, initial=0.0)
    size = max(1.0, float(np.abs(setpoints).max(initial=0.0)))
    off = np.flatnonzero(miss > REACHABLE_TOLERANCE * size)
    if not off.size:
        return []
    return [WarningReport(code=reach.code, message=f"From step {int(off[0])} of this run: {reach.message}")]


def simulate_response(
    request: SimulateRequest, inputs: SimulationInputs, outcome: SimulationOutcome
) -> SimulateResponse:
    """Turn the computed run into the response model."""
    plant = inputs.design.plant
    columns = _columns(plant, outcome.estimator)
    est = outcome.estimator
    gain = None
    if outcome.estimator_gain is not None:
        gain = LabelledMatrix(
            rows=columns.estimates, columns=[s.name for s in plant.measured], values=outcome.estimator_gain.tolist()
        )
    whole = outcome.whole
    warnings = _warnings(inputs, outcome)
    zones = inputs.design.zones
    limits, limit_summary = None, None
    if outcome.limited is not None:
        limits, limit_summary, found = limit_run_reports(outcome.limited, outcome.simulation, outcome.rows, plant)
        warnings += found
    return SimulateResponse(
        steps=inputs.steps,
        sample_time=plant.sample_time,
        time=outcome.time.tolist(),
        outputs=outcome.outputs.tolist(),
        measured=outcome.measured.tolist(),
        setpoints=outcome.setpoints.tolist(),
        inputs=outcome.inputs.tolist(),
        estimates=outcome.estimates.tolist(),
        measured_disturbances=outcome.measured_disturbances.tolist(),
        columns=columns,
        diverged_at=outcome.rows
        if outcome.rows < inputs.steps
        else (None if outcome.diverging is None else outcome.diverging[0]),
        true_loop=None
        if outcome.true is None
        else TrueLoopReport(
            poles=_poles(outcome.true.poles),
            spectral_radius=outcome.true.spectral_radius,
            stable=outcome.true.stable,
        ),
        performance=performance_report(inputs.design, outcome),
        estimator=EstimatorReport(
            kind=est.kind,
            disturbance=est.disturbance,
            disturbances=list(est.disturbances) or None,
            gain=gain,
            poles=_poles(est.poles),
            spectral_radius=est.spectral_radius,
        ),
        whole_loop=WholeLoopReport(
            poles=_poles(whole.poles),
            controller_poles=_poles(whole.controller_poles),
            estimator_poles=_poles(whole.estimator_poles),
            separation_holds=whole.separation_holds,
            separation_error=whole.separation_error,
            spectral_radius=whole.spectral_radius,
            stable=whole.stable,
            marginal_modes=marginal_mode_reports(outcome.design.design.loop.marginal, plant),
        ),
        design=design_response(inputs.design, outcome.design),
        limits=limits,
        limit_summary=limit_summary,
        zones=None if zones is None else zone_run_reports(zones, plant, outcome.outputs),
        warnings=warnings,
        fingerprint=fingerprint(request),
        advisory=ADVISORY,
    )


def checked_simulation(
    request: SimulateRequest, caps: Caps
) -> tuple[SimulateRequest, OperatingPointValues | None, SimulationInputs]:
    """The checks of POST /simulate, for every route that runs a scenario as /simulate does.

    Returns the request in deviations from its ``model.operating_point``, that point (None
    without one) and the checked inputs; the point itself is checked against the run (a true
    plant's own operating point is refused, measured outputs of their own need theirs).

    Raises
    ------
    InvalidRequest, NumericalError
    """
    deviations, point = to_deviations(request)
    assert isinstance(deviations, SimulateRequest)
    inputs = checked_at_point(lambda: check_simulate_request(deviations, caps), deviations, point, caps)
    if point is not None:
        check_operating_point(deviations, point, inputs.design.plant)
    return deviations, point, inputs


def run_simulation(request: SimulateRequest, caps: Caps) -> SimulateResponse:
    """Check, design, estimate, simulate and report: the whole of POST /simulate without HTTP.

    Raises
    ------
    InvalidRequest, NumericalError
    """
    deviations, point, inputs = checked_simulation(request, caps)
    if point is None:
        return simulate_response(request, inputs, compute_simulation(inputs))
    response = simulate_response(deviations, inputs, compute_simulation(inputs))
    simulation_to_absolute(response, point, inputs.design.plant)
    response.fingerprint = fingerprint(request)
    response.design.fingerprint = design_fingerprint(request)
    return response


@dataclass(frozen=True)
class SimulationAnswer:
    """A /simulate answer already written out, with its media type.

    Attributes
    ----------
    body : bytes
        ``SimulateResponse.model_dump_json()`` or :func:`simulation_csv`, in UTF-8: written in
        the compute process, so the serving process neither unpickles the response model (a
        long run holds many numbers) nor validates and serializes it again.
    media_type : {"application/json", "text/csv"}
    """

    body: bytes
    media_type: str


def run_simulation_answer(request: SimulateRequest, caps: Caps, csv: bool = False) -> SimulationAnswer:
    """:func:`run_simulation`, answered as JSON bytes, or as the CSV of its series when ``csv``.

    Raises
    ------
    InvalidRequest, NumericalError
    """
    response = run_simulation(request, caps)
    if csv:
        return SimulationAnswer(simulation_csv(response).encode("utf-8"), "text/csv")
    return SimulationAnswer(response.model_dump_json().encode("utf-8"), "application/json")


def simulation_csv(response: SimulateResponse) -> str:
    """The time series of a response as CSV (RFC 4180: CRLF line ends, quoted where needed).

    Columns: ``time``, the controlled outputs, their setpoints (``<output>.setpoint``), then
    the manipulated variables, named as in ``response.columns``, then, when the model has
    measured outputs of their own (``columns.measured_own``), the measured outputs; one row per
    step kept.  A
    run under limits adds ``limits.fallback`` (1 where the step's QP failed and held the last
    input, else 0) and ``limits.active`` (the number of active limits the step lists); a run with
    zones adds ``<output>.zone_low`` and ``<output>.zone_high`` per zone output (empty where the
    zone is open on that side), the same on every row.
    Numbers are written in Python's shortest round-trip form, so the same response always
    gives the same bytes and every value reads back exactly; header cells a spreadsheet
    could run as a formula get a leading ``'`` (:func:`~service.pipeline.csv_cells.text_cell`).
    """
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\r\n")
    c = response.columns
    extra: list[list[str]] = [[] for _ in response.time]
    header = ["time", *c.outputs, *c.setpoints, *c.inputs]
    if c.measured_own:
        header += c.measured
        extra = [[repr(v) for v in row] for row in response.measured]
    if response.limits is not None:
        header = _unique([*header, "limits.fallback", "limits.active"])
        flags = [["0", "0"] for _ in response.time]
        for row in response.limits.steps:
            flags[row.step] = [str(int(row.fallback)), str(len(row.active))]
        extra = [[*row, *more] for row, more in zip(extra, flags, strict=True)]
    for zone in response.zones or []:
        header = _unique([*header, f"{zone.output}.zone_low", f"{zone.output}.zone_high"])
        edges = ["" if v is None else repr(v) for v in (zone.low, zone.high)]
        extra = [[*row, *edges] for row in extra]
    writer.writerow([text_cell(name) for name in header])
    for t, y, r, u, more in zip(
        response.time, response.outputs, response.setpoints, response.inputs, extra, strict=True
    ):
        writer.writerow([repr(t), *map(repr, y), *map(repr, r), *map(repr, u), *more])
    return buffer.getvalue()
