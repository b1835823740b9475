"""POST /design/compare: the design in service against a proposed one, for a change review.

Each side is exactly what a separate /design call answers for its request, and its scenario
figures exactly what a separate /simulate call answers for that request with the scenario:
this module only runs those pipelines (:mod:`service.pipeline.design`,
:mod:`service.pipeline.simulate`) and sets their answers side by side.  Problems of either
request point into the compare request (``/in_service/...``, ``/proposed/...``; the
scenario's stay under ``/scenario``).  :mod:`service.pipeline.compare_text` writes the
summary sentences and the Markdown for the change record.  Each side may carry its own
``model.operating_point`` (a plant moved to a new operating point): it is checked and
designed in deviations from it, and answered in absolute units, as /design does.

The default scenario steps every controlled output at once by its span (without one, by its
natural size, the size of the default filter's noise for it, so that its unit decides nothing),
from rest on each design's own model (from the design in service's operating point, in
absolute units, when it has one), and runs for ten time constants of the slower
dominant closed-loop pole after the step (at least 50 and at most 2000 samples; 200 when a
loop does not settle), so that both designs can settle.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from typing import TypeVar

from service.errors import FieldProblem, InvalidRequest, NumericalError
from service.pipeline.caps import Caps
from service.pipeline.compare_text import summary
from service.pipeline.design import DesignInputs, check_design_request, compute_design, design_response
from service.pipeline.estimator import signal_sizes as estimator_signal_sizes
from service.pipeline.fingerprint import design_fingerprint
from service.pipeline.operating_point import (
    OperatingPointValues,
    check_operating_point,
    checked_at_point,
    design_to_absolute,
    to_deviations,
)
from service.pipeline.plant import DiscretePlant
from service.pipeline.problems import pointer
from service.pipeline.simulate import checked_simulation, compute_simulation, performance_report
from service.pipeline.sweep import simulate_request
from service.schemas.compare import (
    CompareRequest,
    CompareResponse,
    DominantPoleReport,
    FigureChange,
    GainChange,
    LoopRobustnessChange,
    RobustnessChange,
    ScenarioComparison,
    SideReport,
)
from service.schemas.design import DesignRequest, DesignResponse, PoleReport
from service.schemas.robustness import LoopRobustnessReport
from service.schemas.simulate import PerformanceReport, ScenarioRequest
from service.solver.models.scaling import scale_plant

__all__ = [
    "DEFAULT_SEGMENT",
    "CompareInputs",
    "check_compare_request",
    "compare_response",
    "default_scenario",
    "run_compare",
]

T = TypeVar("T")

#: Samples of each step of the default scenario when a loop does not settle (a pole on or
#: outside the unit circle), and the bounds otherwise.
DEFAULT_SEGMENT = 200
MIN_SEGMENT, MAX_SEGMENT = 50, 2000
#: Time constants of the slower design per step of the default scenario (common practice, with
#: room for the estimator and the plant's zeros: a first-order response is within 0.25 % after six).
SETTLING_TIME_CONSTANTS = 10.0
#: Samples at rest before the first step.
LEAD_IN = 5


@dataclass(frozen=True)
class CompareInputs:
    """The two checked design requests (the robustness flag applied)."""

    in_service: DesignRequest
    proposed: DesignRequest
    in_service_inputs: DesignInputs
    proposed_inputs: DesignInputs
    #: Each side's ``model.operating_point`` (None without one): the inputs are in deviations
    #: from it, the answers in absolute units, as /design's.
    in_service_point: OperatingPointValues | None = None
    proposed_point: OperatingPointValues | None = None


def _moved(where: str, side: str) -> str:
    return where if where == "/scenario" or where.startswith("/scenario/") else f"/{side}{where}"


def _on_side(side: str, check: Callable[[], T]) -> T:
    """Run a pipeline step of one side, its problems pointing into the compare request."""
    try:
        return check()
    except InvalidRequest as exc:
        raise InvalidRequest([FieldProblem(_moved(p.pointer, side), p.detail) for p in exc.problems]) from None
    except NumericalError as exc:
        if not exc.field:
            raise type(exc)(exc.detail, field=(side,)) from None
        key = exc.field if exc.field[0] == "scenario" else (side, *exc.field)
        raise type(exc)(exc.detail, field=key) from None


def _with_robustness(request: DesignRequest, wanted: bool) -> DesignRequest:
    if not wanted or request.analysis.frequency:
        return request
    return request.model_copy(update={"analysis": request.analysis.model_copy(update={"frequency": True})})


def check_compare_request(request: CompareRequest, caps: Caps) -> CompareInputs:
    """Check both design requests (problems of both together) and that they control the same signals.

    Raises
    ------
    InvalidRequest
        Pointers under ``/in_service`` and ``/proposed``.
    """
    sides = {
        "in_service": _with_robustness(request.in_service, request.robustness),
        "proposed": _with_robustness(request.proposed, request.robustness),
    }
    checked: dict[str, DesignInputs] = {}
    points: dict[str, OperatingPointValues | None] = {}
    problems: list[FieldProblem] = []
    for side, design in sides.items():
        try:
            checked[side], points[side] = _on_side(side, lambda design=design: _checked_side(design, caps))  # type: ignore[misc]
        except InvalidRequest as exc:
            problems += exc.problems
    if problems:
        raise InvalidRequest(problems)
    old, new = checked["in_service"].plant, checked["proposed"].plant
    for field, what in (("inputs", "manipulated variables"), ("outputs", "controlled outputs")):
        before = [s.name for s in getattr(old, field)]
        after = [s.name for s in getattr(new, field)]
        if before != after:
            problems.append(
                FieldProblem(
                    pointer("proposed", "model", field),
                    f"the proposed design's {what} {after} are not those of the design in service {before}: a "
                    "comparison needs the same signals (tags), in the same order",
                )
            )
    if [s.name for s in old.disturbances] != [s.name for s in new.disturbances]:
        problems.append(
            FieldProblem(
                pointer("proposed", "model", "disturbances"),
                "the proposed design's measured disturbances are not those of the design in service",
            )
        )
    if old.sample_time != new.sample_time:
        problems.append(
            FieldProblem(
                pointer("proposed", "model", "sample_time"),
                f"the proposed design runs every {new.sample_time!r}, the one in service every {old.sample_time!r}: "
                "compare designs at the same sample time",
            )
        )
    if problems:
        raise InvalidRequest(problems)
    return CompareInputs(
        in_service=sides["in_service"],
        proposed=sides["proposed"],
        in_service_inputs=checked["in_service"],
        proposed_inputs=checked["proposed"],
        in_service_point=points["in_service"],
        proposed_point=points["proposed"],
    )


def _checked_side(request: DesignRequest, caps: Caps) -> tuple[DesignInputs, OperatingPointValues | None]:
    """One side checked as /design checks it: in deviations from its operating point, if it has one."""
    deviations, point = to_deviations(request)
    inputs = checked_at_point(lambda: check_design_request(deviations, caps), deviations, point, caps)
    if point is None:
        return inputs, None
    check_operating_point(deviations, point, inputs.plant)
    # the fingerprint names the request as sent, in absolute units (as /design's)
    return replace(inputs, fingerprint=design_fingerprint(request)), point


def _designed(inputs: DesignInputs, point: OperatingPointValues | None) -> DesignResponse:
    response = design_response(inputs, compute_design(inputs))
    if point is not None:
        design_to_absolute(response, point, inputs.plant)
    return response


def _pole_report(pole: PoleReport, sample_time: float) -> DominantPoleReport:
    modulus = math.hypot(pole.real, pole.imag)
    tau = -sample_time / math.log(modulus) if 0.0 < modulus < 1.0 else None
    return DominantPoleReport(pole=pole, modulus=modulus, time_constant=tau)


def _dominant(response: DesignResponse, sample_time: float) -> DominantPoleReport:
    return _pole_report(response.closed_loop.poles[0], sample_time)


def _settling(response: DesignResponse, sample_time: float) -> DominantPoleReport | None:
    """The largest pole once each marginal mode's pole is set aside (the nearest pole to it, once each)."""
    left = list(response.closed_loop.poles)
    for mode in response.closed_loop.marginal_modes:
        if not left:
            break
        gaps = [abs(complex(p.real, p.imag) - complex(mode.pole.real, mode.pole.imag)) for p in left]
        left.pop(gaps.index(min(gaps)))
    if not left:
        return None
    return _pole_report(max(left, key=lambda p: math.hypot(p.real, p.imag)), sample_time)


#: A tag or state: ``(kind, name)`` with kind ``"inputs"``, ``"outputs"``, ``"states"`` or ``"disturbances"``.
SignalKey = tuple[str, str]


def signal_sizes(plant: DiscretePlant) -> dict[SignalKey, float]:
    """Each signal's size in its own unit: its span where it has one, else its natural size.

    The natural sizes are those of the default filter's noises
    (:func:`service.solver.estimation.sizes.natural_sizes`, on the plant with its spans; a
    scaled plant keeps the model's states, so the states' sizes are in the model's own state
    coordinates).  A measured disturbance without a span, which the natural sizes do not
    cover, and a state no output sees (natural size 0) count 1.  They make the comparison free
    of the units the signals are written in: the default scenario's step and the ranking of
    the gain changes.
    """
    scaled = scale_plant(plant.a, plant.b, plant.c, input_span=plant.input_spans, output_span=plant.output_spans)
    sizes = estimator_signal_sizes(plant, scaled, measured=False)  # the default filter's, of the controlled outputs
    found: dict[SignalKey, float] = {}
    for kind, signals, natural in (("outputs", plant.outputs, sizes.outputs), ("inputs", plant.inputs, sizes.inputs)):
        for signal, size in zip(signals, natural, strict=True):
            found[(kind, signal.name)] = signal.span if signal.spanned else (float(size) if size > 0.0 else 1.0)
    for name, size in zip(plant.state_labels, sizes.states, strict=True):
        found[("states", name)] = float(size) if size > 0.0 else 1.0
    for signal in plant.disturbances:
        found[("disturbances", signal.name)] = signal.span if signal.spanned else 1.0
    return found


def _step_sizes(plant: DiscretePlant) -> list[float]:
    """One span per output that has one, else the output's natural size in its own unit (:func:`signal_sizes`).

    A step of 1 in an output's own unit would make the comparison's figures depend on that
    unit, because every output steps at once and each one's step sets how much the others'
    steps disturb it (a pressure stepped by 1 Pa took the temperature's coupling as a 32 %
    overshoot, by 1 kPa as 1.8 %).
    """
    sizes = signal_sizes(plant)
    return [sizes[("outputs", s.name)] for s in plant.outputs]


def default_scenario(
    responses: list[DesignResponse], inputs: DesignInputs, *, point: OperatingPointValues | None = None
) -> ScenarioRequest:
    """A setpoint step of one span on every controlled output at once (module notes).

    With the design in service's operating point the step goes from it to one span above it,
    in absolute units, the same scenario for both designs.
    """
    plant = inputs.plant
    taus = [_dominant(r, 1.0).time_constant for r in responses]
    if any(t is None for t in taus):
        segment = DEFAULT_SEGMENT
    else:
        slowest = max(t for t in taus if t is not None)
        segment = min(max(math.ceil(SETTLING_TIME_CONSTANTS * slowest), MIN_SEGMENT), MAX_SEGMENT)
    setpoint = _step_sizes(plant)
    if point is not None and point.outputs is not None:
        setpoint = [z0 + step for z0, step in zip(point.outputs, setpoint, strict=True)]
    return ScenarioRequest.model_validate(
        {"steps": LEAD_IN + segment, "setpoint_changes": [{"step": LEAD_IN, "setpoint": setpoint}]}
    )


def _gain_entries(response: DesignResponse) -> dict[tuple[str, str, str], float]:
    g, labels = response.gain, response.gain.labels
    out: dict[tuple[str, str, str], float] = {}
    blocks = [
        ("setpoint", g.setpoint, labels.setpoint),
        ("state", g.state, labels.state),
        ("previous_input", g.previous_input, labels.previous_input),
        ("disturbance", g.disturbance or [], labels.disturbance),
    ]
    for name, matrix, columns in blocks:
        for row, values in zip(labels.rows, matrix, strict=False):
            for column, value in zip(columns, values, strict=True):
                out[(name, row, column)] = float(value)
    return out


#: Which signals name the columns of each gain.
_COLUMN_SIGNALS = {"setpoint": "outputs", "state": "states", "previous_input": "inputs", "disturbance": "disturbances"}


def gain_changes(
    before: DesignResponse, after: DesignResponse, sizes: Mapping[SignalKey, float] | None = None
) -> list[GainChange]:
    """Every entry of Kr, Kx, Ku and Kd of either design, largest scaled change first (unmatched last).

    The scaled change is ``change * size(column) / size(row)`` (rows are inputs, columns
    outputs, states, inputs or measured disturbances): the change of the gain between the
    signals divided by their sizes, so that gains in different engineering units rank by what
    they do to the signals in their typical ranges, and the ranking does not depend on the
    units the tags are written in.  ``sizes`` (:func:`signal_sizes`; the design in service's,
    then the proposed one's for what only it has) gives them; a signal it lacks counts 1, and
    without ``sizes`` it is the change itself.
    """
    old, new = _gain_entries(before), _gain_entries(after)
    keys = list(old) + [k for k in new if k not in old]
    found = sizes or {}
    changes = []
    for key in keys:
        a, b = old.get(key), new.get(key)
        change = None if a is None or b is None else b - a
        relative = None if change is None or a is None or a == 0.0 else change / abs(a)
        scaled = None
        if change is not None:
            column = found.get((_COLUMN_SIGNALS[key[0]], key[2]), 1.0)
            scaled = change * column / found.get(("inputs", key[1]), 1.0)
        changes.append(
            GainChange(
                gain=key[0],
                row=key[1],
                column=key[2],
                in_service=a,
                proposed=b,
                change=change,
                relative_change=relative,
                scaled_change=scaled,
            )
        )
    changes.sort(key=lambda c: (c.scaled_change is None, -abs(c.scaled_change or 0.0)))
    return changes


def _side(request: DesignRequest, response: DesignResponse, sample_time: float) -> SideReport:
    return SideReport(
        fingerprint=design_fingerprint(request),
        poles=response.closed_loop.poles,
        dominant_pole=_dominant(response, sample_time),
        settling_pole=_settling(response, sample_time),
        stable=response.closed_loop.stable,
        hessian_condition_number=response.hessian.condition_number,
        warnings=[w.code for w in response.warnings],
    )


def _loop_change(a: LoopRobustnessReport, b: LoopRobustnessReport) -> LoopRobustnessChange:
    def margin(report: LoopRobustnessReport, name: str) -> float | None:
        return None if report.margins is None else getattr(report.margins, name)

    return LoopRobustnessChange(
        peak_sensitivity=[a.peak_sensitivity, b.peak_sensitivity],
        peak_complementary=[a.peak_complementary, b.peak_complementary],
        bandwidth=[a.bandwidth, b.bandwidth],
        gain_margin=[margin(a, "gain_margin"), margin(b, "gain_margin")],
        phase_margin=[margin(a, "phase_margin"), margin(b, "phase_margin")],
    )


def _figures(before: PerformanceReport, after: PerformanceReport) -> list[FigureChange]:
    out = []
    for a, b in zip(before.outputs, after.outputs, strict=True):
        change = None
        if a.settling_time and b.settling_time is not None:
            change = 100.0 * (b.settling_time - a.settling_time) / a.settling_time
        out.append(
            FigureChange(
                name=a.name,
                rise_time=[a.rise_time, b.rise_time],
                settling_time=[a.settling_time, b.settling_time],
                overshoot_percent=[a.overshoot_percent, b.overshoot_percent],
                integral_absolute_error=[a.integral_absolute_error, b.integral_absolute_error],
                zone=a.zone,
                settling_change_percent=change,
            )
        )
    return out


def _run(side: str, request: DesignRequest, scenario: ScenarioRequest, caps: Caps) -> tuple[PerformanceReport, bool]:
    def run() -> tuple[PerformanceReport, bool]:
        _, _, inputs = checked_simulation(simulate_request(request, scenario), caps)
        outcome = compute_simulation(inputs)
        return performance_report(inputs.design, outcome), outcome.rows < inputs.steps

    return _on_side(side, run)


def compare_response(request: CompareRequest, inputs: CompareInputs, caps: Caps) -> CompareResponse:
    """Design both, run the scenario with both, and set the answers side by side.

    Raises
    ------
    InvalidRequest, NumericalError
        Pointers into the compare request.
    """
    before = _on_side("in_service", lambda: _designed(inputs.in_service_inputs, inputs.in_service_point))
    after = _on_side("proposed", lambda: _designed(inputs.proposed_inputs, inputs.proposed_point))
    sample_time = inputs.in_service_inputs.plant.sample_time
    scenario = request.scenario or default_scenario(
        [before, after], inputs.in_service_inputs, point=inputs.in_service_point
    )
    run_before, diverged_before = _run("in_service", inputs.in_service, scenario, caps)
    run_after, diverged_after = _run("proposed", inputs.proposed, scenario, caps)
    robustness = None
    if before.robustness is not None and after.robustness is not None:
        robustness = RobustnessChange(
            plant_input=_loop_change(before.robustness.plant_input, after.robustness.plant_input),
            plant_output=_loop_change(before.robustness.plant_output, after.robustness.plant_output),
            plant_output_signals=[before.robustness.plant_output_signals, after.robustness.plant_output_signals],
        )
    answer = CompareResponse(
        summary=[],
        gain_changes=gain_changes(
            before,
            after,
            {**signal_sizes(inputs.proposed_inputs.plant), **signal_sizes(inputs.in_service_inputs.plant)},
        ),
        in_service=_side(inputs.in_service, before, sample_time),
        proposed=_side(inputs.proposed, after, sample_time),
        robustness=robustness,
        scenario=ScenarioComparison(
            default=request.scenario is None,
            scenario=scenario,
            in_service=run_before,
            proposed=run_after,
            outputs=_figures(run_before, run_after),
            diverged=[diverged_before, diverged_after],
        ),
        in_service_design=before,
        proposed_design=after,
    )
    same_model = inputs.in_service_inputs.plant.states == inputs.proposed_inputs.plant.states and all(
        (getattr(inputs.in_service_inputs.plant, k) == getattr(inputs.proposed_inputs.plant, k)).all()
        for k in ("a", "b", "c")
    )
    answer.summary = summary(answer, same_model=same_model)
    return answer


def run_compare(request: CompareRequest, caps: Caps) -> CompareResponse:
    """Check, design, simulate and compare: the whole of POST /design/compare without HTTP.

    Raises
    ------
    InvalidRequest, NumericalError
    """
    inputs = check_compare_request(request, caps)
    return compare_response(request, inputs, caps)
