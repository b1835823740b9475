"""The checks of a /simulate request: everything its field types alone cannot say.

:func:`check_simulate_request` runs the /design checks (the estimator's among them: kinds,
covariance sizes, positive-definite measurement noise; :mod:`service.pipeline.estimator`),
then those of the scenario (events inside the run and of the right length, the true plant's
sizes, sample time and tags, the initial conditions) and the caps (steps, numbers kept,
estimated work).  Every problem names its field by JSON pointer; problems are collected, not
raised one at a time.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from service.errors import FieldProblem, InvalidRequest
from service.pipeline.caps import Caps, plant_run_entries, plant_run_work
from service.pipeline.design import DesignInputs, check_design_request
from service.pipeline.limits_checks import check_initial_input, limit_work_problems, no_limits
from service.pipeline.plant import DiscretePlant, plant_arrays
from service.pipeline.problems import pointer
from service.schemas.simulate import SimulateRequest
from service.solver.design.closed_loop import Diagnostic
from service.solver.evaluation.simulation import Event

__all__ = ["SimulationInputs", "check_simulate_request"]

Where = tuple[str | int, ...]


@dataclass(frozen=True)
class SimulationInputs:
    """A /simulate request after every check, in engineering units.

    Attributes
    ----------
    design : DesignInputs
    kind, disturbance : str
        Estimator kind and its disturbance model (``"output"``, ``"input"``, ``"none"``).
    process_noise, disturbance_noise, measurement_noise : ndarray or None
        Covariances as given (diagonal ``(k,)`` or full ``(k, k)``); ``None`` for the default.
    true_plant : DiscretePlant or None
        ``None``: the loop runs on the model.
    steps : int
    setpoints, output_disturbances, input_disturbances, measured_disturbances : list of Event
    noise_std : ndarray, shape (py,), or None
        Per measured output.
    seed : int
    initial_state, initial_input, initial_setpoint : ndarray or None
        ``initial_input`` is clipped into the input limits when ``limits.clamp_initial_input``
        asked for it.
    limit_warnings : tuple of Diagnostic
        What the limit checks changed (a clipped initial input), input targets outside the
        input limits, input targets without an input weight.
    input_targets : ndarray, shape (m,), or None
        ``u_t`` before the first change (``None``: zeros, the operating point).
    input_target_changes : list of Event
    """

    design: DesignInputs
    kind: str
    disturbance: str
    process_noise: NDArray[np.float64] | None
    disturbance_noise: NDArray[np.float64] | None
    measurement_noise: NDArray[np.float64] | None
    true_plant: DiscretePlant | None
    steps: int
    setpoints: list[Event]
    output_disturbances: list[Event]
    input_disturbances: list[Event]
    measured_disturbances: list[Event]
    noise_std: NDArray[np.float64] | None
    seed: int
    initial_state: NDArray[np.float64] | None
    initial_input: NDArray[np.float64] | None
    initial_setpoint: NDArray[np.float64] | None
    limit_warnings: tuple[Diagnostic, ...] = ()
    input_targets: NDArray[np.float64] | None = None
    input_target_changes: tuple[Event, ...] = ()


def _length(value: list[float] | None, size: int, where: Where, what: str) -> list[FieldProblem]:
    if value is None or len(value) == size:
        return []
    return [FieldProblem(pointer(*where), f"{what} has {len(value)} values, expected {size}")]


def _events(
    changes: list[Any], field: str, value_field: str, *, steps: int, size: int, what: str
) -> tuple[list[Event], list[FieldProblem]]:
    problems: list[FieldProblem] = []
    events: list[Event] = []
    for i, change in enumerate(changes):
        where = ("scenario", field, i)
        if change.step >= steps:
            problems.append(
                FieldProblem(
                    pointer(*where, "step"),
                    f"step {change.step} is outside the run: steps go from 0 to {steps - 1} (scenario.steps = {steps})",
                )
            )
        value = getattr(change, value_field)
        problems += _length(value, size, (*where, value_field), what)
        events.append(Event(change.step, np.asarray(value, dtype=float)))
    return events, problems


def _input_target_warnings(
    design: DesignInputs, plant: DiscretePlant, targets: list[NDArray[np.float64]]
) -> list[Diagnostic]:
    """Input targets the run cannot honour as given: outside the input limits, or without a weight."""
    if not targets:
        return []
    if design.input_weight is None:
        return [
            Diagnostic(
                "input_targets_unused",
                "scenario.input_targets (or input_target_changes) are given but weights.input is absent or all "
                "zero, so nothing pulls the inputs towards them: give weights.input a positive weight for the "
                "inputs that should settle on their targets.",
            )
        ]
    limits = design.limits
    if limits is None:
        return []
    names = [s.name for s in plant.inputs]
    outside = sorted(
        {
            j
            for value in targets
            for j in range(min(value.size, len(names)))
            if value[j] < limits.input_min[j] or value[j] > limits.input_max[j]
        }
    )
    if not outside:
        return []
    tags = ", ".join(repr(names[j]) for j in outside)
    return [
        Diagnostic(
            "input_target_outside_limits",
            f"The input target of {tags} lies outside its input limits: the steady-state target keeps the "
            f"input inside them, as near its target as the limits allow (the outputs still come first).",
        )
    ]


def _true_plant_problems(
    request: SimulateRequest, plant: DiscretePlant, caps: Caps
) -> tuple[DiscretePlant | None, list[FieldProblem]]:
    model = request.scenario.true_plant
    if model is None:
        return None, []
    where = ("scenario", "true_plant")
    true, problems = plant_arrays(model, caps, where)
    if true is None:
        return None, problems
    if true.input_count != plant.input_count:
        problems.append(
            FieldProblem(
                pointer(*where), f"the true plant has {true.input_count} inputs; the model has {plant.input_count}"
            )
        )
    if true.output_count != plant.output_count:
        problems.append(
            FieldProblem(
                pointer(*where),
                f"the true plant has {true.output_count} controlled outputs; the model has {plant.output_count}",
            )
        )
    md_true = 0 if true.b_disturbance is None else true.b_disturbance.shape[1]
    md = 0 if plant.b_disturbance is None else plant.b_disturbance.shape[1]
    if md_true != md:
        problems.append(
            FieldProblem(
                pointer(*where),
                f"the true plant has {md_true} measured disturbances; the model has {md} (the same signals must "
                f"enter both: give the true plant's own b_disturbance or disturbance_elements)",
            )
        )
    if true.sample_time != plant.sample_time:
        problems.append(
            FieldProblem(
                pointer(*where, "sample_time"),
                f"the true plant's sample time {true.sample_time:g} differs from the model's {plant.sample_time:g}",
            )
        )
    problems += _true_measured_problems(model, plant, true, where)
    for tags, mine, theirs in (
        ("inputs", plant.inputs, true.inputs),
        ("outputs", plant.outputs, true.outputs),
        ("measured", plant.measured, true.measured),
    ):
        if getattr(model, tags, None) is None or len(mine) != len(theirs):
            continue
        for i, (a, b) in enumerate(zip(mine, theirs, strict=True)):
            if a.name != b.name:
                problems.append(
                    FieldProblem(
                        pointer(*where, tags, i, "name"),
                        f"the true plant's {tags} must be the model's, in the same order: expected {a.name!r}, got {b.name!r}",
                    )
                )
    if true.states != plant.states:
        if request.scenario.initial.state is not None:
            problems.append(
                FieldProblem(
                    pointer("scenario", "initial", "state"),
                    f"the true plant has {true.states} states and the model {plant.states}: an initial state cannot "
                    f"mean both. Leave it out (the run then starts from rest) or give the true plant the model's states",
                )
            )
        if request.estimator.kind == "full_state":
            problems.append(
                FieldProblem(
                    pointer(*where),
                    f"a full_state estimator reads the true state, so the true plant needs the model's {plant.states} "
                    f"states (it has {true.states}); use an estimator, or a true plant of the model's form",
                )
            )
    return true, problems


def _true_measured_problems(model: Any, plant: DiscretePlant, true: DiscretePlant, where: Where) -> list[FieldProblem]:
    """The true plant's measured outputs: as many as the model's, and the model's feed-through."""
    py, py_true = plant.c_measured.shape[0], true.c_measured.shape[0]
    if py_true != py:
        field = "c_measured" if getattr(model, "c_measured", None) is not None else "c"
        return [
            FieldProblem(
                pointer(*where, field),
                f"the true plant has {py_true} measured outputs; the model has {py} (the estimator reads the "
                f"model's measured outputs{': ' + ', '.join(s.name for s in plant.measured) if py <= 8 else ''}; "
                f"give the true plant the same ones in c_measured)",
            )
        ]
    if not np.array_equal(true.d_measured, plant.d_measured):
        return [
            FieldProblem(
                pointer(*where, "d_measured"),
                "the true plant's measured feed-through must be the model's: the estimator subtracts the model's "
                "d_measured times the input applied at the same sample, and any other feed-through would make that "
                "input depend on itself through the measurement (an algebraic loop). Give the model's d_measured "
                "(or leave both out), and put the model error in a, b or c_measured",
            )
        ]
    return []


def _run_size_problems(
    request: SimulateRequest, plant: DiscretePlant, true: DiscretePlant | None, disturbance: str, caps: Caps
) -> list[FieldProblem]:
    sc = request.scenario
    where = pointer("scenario", "steps")
    if sc.steps > caps.max_simulation_steps:
        return [FieldProblem(where, f"{sc.steps:,} steps exceed this service's cap of {caps.max_simulation_steps:,}")]
    h = request.horizons
    penalized = max(h.prediction - h.first_penalized + 1, 1)
    entries = plant_run_entries(plant, true_plant=true, disturbance=disturbance, steps=sc.steps)
    if entries > caps.max_response_entries:
        return [
            FieldProblem(
                where,
                f"the run would hold {entries:,} numbers ({sc.steps:,} steps of every series); this service "
                f"returns at most {caps.max_response_entries:,}. Simulate at most "
                f"{caps.max_response_entries // (entries // sc.steps):,} steps of this loop",
            )
        ]
    work = plant_run_work(plant, true_plant=true, disturbance=disturbance, steps=sc.steps, penalized_steps=penalized)
    if work > caps.max_simulation_work:
        most = caps.max_simulation_work // max(work // sc.steps, 1)
        return [
            FieldProblem(
                where,
                f"the run would take about {work:.2e} floating-point operations; this service accepts at most "
                f"{caps.max_simulation_work:.2e}. Simulate at most {most:,} steps of this loop, or shorten the "
                f"prediction horizon",
            )
        ]
    return []


def check_simulate_request(request: SimulateRequest, caps: Caps) -> SimulationInputs:
    """Check everything the field types alone cannot, naming each field by JSON pointer.

    Raises
    ------
    InvalidRequest
        With one FieldProblem per broken rule.
    service.errors.NumericalError
        When a continuous model (or true plant) cannot be sampled.
    """
    problems: list[FieldProblem] = []
    design: DesignInputs | None = None
    try:
        design = check_design_request(request, caps)
        plant: DiscretePlant | None = design.plant
    except InvalidRequest as exc:
        problems += exc.problems
        plant, _ = plant_arrays(request.model, caps)
    if plant is None:
        raise InvalidRequest(problems)
    true, found = _true_plant_problems(request, plant, caps)
    problems += found

    sc = request.scenario
    steps = sc.steps
    n, m, p = plant.states, plant.input_count, plant.output_count
    md = 0 if plant.b_disturbance is None else plant.b_disturbance.shape[1]
    setpoints, found = _events(
        sc.setpoint_changes, "setpoint_changes", "setpoint", steps=steps, size=p, what="setpoint"
    )
    problems += found
    d_out, found = _events(
        sc.output_disturbances, "output_disturbances", "value", steps=steps, size=p, what="output disturbance"
    )
    problems += found
    d_in, found = _events(
        sc.input_disturbances, "input_disturbances", "value", steps=steps, size=m, what="input disturbance"
    )
    problems += found
    if sc.measured_disturbances and md == 0:
        problems.append(
            FieldProblem(
                pointer("scenario", "measured_disturbances"),
                "the model has no measured disturbances (give b_disturbance or disturbance_elements) to apply these to",
            )
        )
        d_meas: list[Event] = []
    else:
        d_meas, found = _events(
            sc.measured_disturbances,
            "measured_disturbances",
            "value",
            steps=steps,
            size=md,
            what="measured disturbance",
        )
        problems += found
    problems += _length(sc.input_targets, m, ("scenario", "input_targets"), "the input targets")
    target_changes, found = _events(
        sc.input_target_changes, "input_target_changes", "value", steps=steps, size=m, what="input target"
    )
    problems += found
    noise = sc.measurement_noise
    if noise is not None:
        py = plant.c_measured.shape[0]
        what = "the noise spread (one per measured output)" if plant.measured_own else "the noise spread"
        problems += _length(noise.std, py, ("scenario", "measurement_noise", "std"), what)
    init = sc.initial
    problems += _length(init.state, n, ("scenario", "initial", "state"), "the initial state")
    problems += _length(init.input, m, ("scenario", "initial", "input"), "the initial input")
    problems += _length(init.setpoint, p, ("scenario", "initial", "setpoint"), "the initial setpoint")
    clamped, limit_warnings, found = check_initial_input(None if design is None else design.limits, init.input, plant)
    problems += found
    if not problems and design is not None:
        assert design.estimator is not None  # check_design_request checks every request's estimator
        problems += _run_size_problems(request, plant, true, design.estimator.disturbance, caps)
        if not problems:
            problems += limit_work_problems(
                design.limits if design.limits is not None or design.zones is None else no_limits(plant),
                steps=steps,
                free_moves=design.free_moves,
                penalized_steps=max(design.prediction - design.first_penalized + 1, 1),
                caps=caps,
                zone_outputs=0 if design.zones is None else len(design.zones.outputs),
            )
    if problems or design is None:
        raise InvalidRequest(problems)
    est = design.estimator
    assert est is not None

    def vector(value: list[float] | None) -> NDArray[np.float64] | None:
        return None if value is None else np.asarray(value, dtype=float)

    given = [e.value for e in target_changes]
    if sc.input_targets is not None:
        given.insert(0, np.asarray(sc.input_targets, dtype=float))
    limit_warnings = [*limit_warnings, *_input_target_warnings(design, plant, given)]

    return SimulationInputs(
        design=design,
        kind=est.kind,
        disturbance=est.disturbance,
        process_noise=est.process_noise,
        disturbance_noise=est.disturbance_noise,
        measurement_noise=est.measurement_noise,
        true_plant=true,
        steps=steps,
        setpoints=setpoints,
        output_disturbances=d_out,
        input_disturbances=d_in,
        measured_disturbances=d_meas,
        noise_std=None if noise is None else np.asarray(noise.std, dtype=float),
        seed=0 if noise is None else noise.seed,
        initial_state=vector(init.state),
        initial_input=vector(init.input) if clamped is None else clamped,
        initial_setpoint=vector(init.setpoint),
        limit_warnings=tuple(limit_warnings),
        input_targets=vector(sc.input_targets),
        input_target_changes=tuple(target_changes),
    )
