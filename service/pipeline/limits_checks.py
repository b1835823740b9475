"""The checks of a request's ``limits``: what their field types alone cannot say.

:func:`check_limits` (called by ``check_design_request``, so /design and /simulate share it)
checks the lengths, that no minimum lies above its maximum, that move limits are above zero,
and that every limit stays a finite number once divided by its signal's span.
:func:`check_initial_input` (called by ``check_simulate_request``) holds the run's initial
input against the input limits: outside them it is refused, or clipped with a warning when
``clamp_initial_input`` asks.  :func:`limit_work_problems` caps the work of a run that solves a
QP at every step.  Every problem names its field by JSON pointer.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.errors import FieldProblem
from service.pipeline.caps import Caps, limit_report_entries, qp_step_work
from service.pipeline.plant import DiscretePlant, Signal
from service.pipeline.problems import pointer
from service.schemas.limits import DEFAULT_OUTPUT_SOFTNESS, LimitsRequest
from service.solver.design.closed_loop import Diagnostic
from service.solver.limits.bounds import Limits, make_limits

__all__ = [
    "LimitInputs",
    "check_initial_input",
    "check_limits",
    "limit_work_problems",
    "no_limits",
]


@dataclass(frozen=True)
class LimitInputs:
    """Checked limits in engineering units; ``-inf``/``+inf`` where a limit is absent.

    Attributes
    ----------
    input_min, input_max, move_max : ndarray, shape (m,)
    output_min, output_max : ndarray, shape (p,)
    output_softness : float
        Per unit of scaled violation (see :class:`service.schemas.limits.LimitsRequest`).
    hard_outputs, clamp_initial_input : bool
    nominal_step : ndarray, shape (p,)
        The setpoint step of /design's limit check.
    """

    input_min: NDArray[np.float64]
    input_max: NDArray[np.float64]
    move_max: NDArray[np.float64]
    output_min: NDArray[np.float64]
    output_max: NDArray[np.float64]
    output_softness: float
    hard_outputs: bool
    clamp_initial_input: bool
    nominal_step: NDArray[np.float64]

    def limits(
        self, input_span: NDArray[np.float64] | None = None, output_span: NDArray[np.float64] | None = None
    ) -> Limits:
        """Return solver :class:`Limits`, divided by the spans when given (the design's scaled signals).

        The softness is per unit of *scaled* violation either way.
        """
        su = np.ones(self.input_min.size) if input_span is None else input_span
        sz = np.ones(self.output_min.size) if output_span is None else output_span
        return make_limits(
            self.input_min.size,
            self.output_min.size,
            input_min=self.input_min / su,
            input_max=self.input_max / su,
            move_max=self.move_max / su,
            output_min=self.output_min / sz,
            output_max=self.output_max / sz,
            output_softness=self.output_softness,
        )


def no_limits(plant: DiscretePlant) -> LimitInputs:
    """Limits of a run with none (every bound absent): the move QP of a run with zones alone."""
    m, p = plant.input_count, plant.output_count
    return LimitInputs(
        input_min=np.full(m, -np.inf),
        input_max=np.full(m, np.inf),
        move_max=np.full(m, np.inf),
        output_min=np.full(p, -np.inf),
        output_max=np.full(p, np.inf),
        output_softness=DEFAULT_OUTPUT_SOFTNESS,
        hard_outputs=False,
        clamp_initial_input=False,
        nominal_step=np.ones(p),
    )


def _vector(
    value: list[float | None] | None, field: str, signals: tuple[Signal, ...], missing: float, what: str
) -> tuple[NDArray[np.float64], list[FieldProblem]]:
    size = len(signals)
    if value is None:
        return np.full(size, missing), []
    if len(value) != size:
        return np.full(size, missing), [
            FieldProblem(
                pointer("limits", field),
                f"{field} has {len(value)} values, expected {size} (one per {what}; null for no limit)",
            )
        ]
    return np.array([missing if v is None else float(v) for v in value], dtype=float), []


def _finite_when_scaled(
    values: NDArray[np.float64], spans: NDArray[np.float64], field: str, signals: tuple[Signal, ...]
) -> list[FieldProblem]:
    problems = []
    with np.errstate(over="ignore"):
        scaled = values / spans
    for j in np.flatnonzero(np.isfinite(values) & ~np.isfinite(scaled)):
        problems.append(
            FieldProblem(
                pointer("limits", field, int(j)),
                f"{field} of {signals[j].name} ({values[j]:g}) is too large for its span ({spans[j]:g}): "
                f"divided by the span it is no longer a finite number",
            )
        )
    return problems


def check_limits(request: LimitsRequest | None, plant: DiscretePlant) -> tuple[LimitInputs | None, list[FieldProblem]]:
    """Check a request's ``limits`` against the plant's signals.

    Returns
    -------
    LimitInputs or None, list of FieldProblem
        ``None`` when the request has no ``limits`` or a problem was found.
    """
    if request is None:
        return None, []
    inputs, outputs = plant.inputs, plant.outputs
    problems: list[FieldProblem] = []
    vectors: dict[str, NDArray[np.float64]] = {}
    for field, signals, missing, what in (
        ("input_min", inputs, -np.inf, "manipulated variable"),
        ("input_max", inputs, np.inf, "manipulated variable"),
        ("move_max", inputs, np.inf, "manipulated variable"),
        ("output_min", outputs, -np.inf, "controlled output"),
        ("output_max", outputs, np.inf, "controlled output"),
    ):
        vectors[field], found = _vector(getattr(request, field), field, signals, missing, what)
        problems += found
    for low, high, signals in (("input_min", "input_max", inputs), ("output_min", "output_max", outputs)):
        for j in np.flatnonzero(vectors[low] > vectors[high]):
            problems.append(
                FieldProblem(
                    pointer("limits", high, int(j)),
                    f"{high} of {signals[j].name} ({vectors[high][j]:g}) is below its {low} ({vectors[low][j]:g})",
                )
            )
    for j in np.flatnonzero(vectors["move_max"] <= 0.0):
        problems.append(
            FieldProblem(
                pointer("limits", "move_max", int(j)),
                f"move_max of {inputs[j].name} is {vectors['move_max'][j]:g}; a move limit must be above 0 "
                f"(null for no limit)",
            )
        )
    su, sz = plant.input_spans, plant.output_spans
    for field, spans, signals in (
        ("input_min", su, inputs),
        ("input_max", su, inputs),
        ("move_max", su, inputs),
        ("output_min", sz, outputs),
        ("output_max", sz, outputs),
    ):
        problems += _finite_when_scaled(vectors[field], spans, field, signals)
    step = np.ones(len(outputs))
    if request.nominal_step is not None:
        if len(request.nominal_step) != len(outputs):
            problems.append(
                FieldProblem(
                    pointer("limits", "nominal_step"),
                    f"nominal_step has {len(request.nominal_step)} values, expected {len(outputs)} (one per "
                    f"controlled output)",
                )
            )
        else:
            step = np.asarray(request.nominal_step, dtype=float)
    if problems:
        return None, problems
    return (
        LimitInputs(
            **vectors,
            output_softness=float(request.output_softness),
            hard_outputs=bool(request.hard_outputs),
            clamp_initial_input=bool(request.clamp_initial_input),
            nominal_step=step,
        ),
        [],
    )


def check_initial_input(
    limits: LimitInputs | None, initial_input: list[float] | None, plant: DiscretePlant
) -> tuple[NDArray[np.float64] | None, list[Diagnostic], list[FieldProblem]]:
    """Hold the run's initial input ``u(-1)`` (default zeros) against the input limits.

    Returns
    -------
    ndarray or None, list of Diagnostic, list of FieldProblem
        The initial input to run with (``None``: as the request gave it, nothing changed),
        warnings about clipped inputs, and problems (an input outside its limits when
        ``clamp_initial_input`` is false).
    """
    m = plant.input_count
    if limits is None or (initial_input is not None and len(initial_input) != m):
        return None, [], []  # no limits, or a wrong length another check reports
    given = initial_input is not None
    u = np.zeros(m) if initial_input is None else np.asarray(initial_input, dtype=float)
    outside = np.flatnonzero((u < limits.input_min) | (u > limits.input_max))
    if outside.size == 0:
        return None, [], []
    warnings: list[Diagnostic] = []
    problems: list[FieldProblem] = []
    clipped = np.clip(u, limits.input_min, limits.input_max)
    for j in outside.tolist():
        name = plant.inputs[j].name
        side, bound = (
            ("below its input_min", limits.input_min[j])
            if u[j] < limits.input_min[j]
            else (
                "above its input_max",
                limits.input_max[j],
            )
        )
        origin = "the initial input" if given else "the initial input (by default 0)"
        if limits.clamp_initial_input:
            warnings.append(
                Diagnostic(
                    "initial_input_clamped",
                    f"{origin} of {name}, {u[j]:g}, was {side} {bound:g}; the run starts from {clipped[j]:g} "
                    f"(limits.clamp_initial_input).",
                )
            )
        else:
            problems.append(
                FieldProblem(
                    pointer("scenario", "initial", "input", j) if given else pointer("scenario", "initial", "input"),
                    f"{origin} of {name}, {u[j]:g}, is {side} {bound:g}: the run would start outside its limits. "
                    f"Give an initial input inside them, or set limits.clamp_initial_input to clip it",
                )
            )
    return (clipped if limits.clamp_initial_input else None), warnings, problems


def limit_work_problems(
    limits: LimitInputs | None,
    *,
    steps: int,
    free_moves: int,
    penalized_steps: int,
    caps: Caps,
    zone_outputs: int = 0,
) -> list[FieldProblem]:
    """The run's QP work and its limit report must fit the service's caps (pointer ``/scenario/steps``).

    ``zone_outputs`` zone outputs add one slack and two rows per penalized step each.
    """
    if limits is None:
        return []
    m, p = limits.input_min.size, limits.output_min.size
    limited = int(np.count_nonzero(np.isfinite(limits.input_min) | np.isfinite(limits.input_max)))
    bounds = int(np.count_nonzero(np.isfinite(limits.output_min)) + np.count_nonzero(np.isfinite(limits.output_max)))
    per_step = qp_step_work(
        free_moves=free_moves,
        inputs=m,
        limited_inputs=limited,
        penalized_steps=penalized_steps,
        output_bounds=bounds,
        soft=not limits.hard_outputs,
        zone_slacks=zone_outputs * penalized_steps,
    )
    where = pointer("scenario", "steps")
    if steps * per_step > caps.max_simulation_work:
        most = max(caps.max_simulation_work // per_step, 1)
        return [
            FieldProblem(
                where,
                f"under limits each step solves a QP: the run would take about {steps * per_step:.2e} "
                f"floating-point operations; this service accepts at most {caps.max_simulation_work:.2e}. "
                f"Simulate at most {most:,} steps, or shorten the horizons",
            )
        ]
    entries = limit_report_entries(steps=steps, inputs=m, outputs=p)
    if entries > caps.max_response_entries:
        return [
            FieldProblem(
                where,
                f"the limit report could hold {entries:,} numbers; this service returns at most "
                f"{caps.max_response_entries:,}. Simulate at most {caps.max_response_entries // (entries // steps):,} steps",
            )
        ]
    return []
