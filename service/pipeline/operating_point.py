"""The operating point: absolute engineering units at the edge, deviations in the solver.

A linear model holds around a steady state ``(u0, z0, d0)``, ``model.operating_point``, with
``y0`` (``measured``) the steady values of measured outputs of their own (``c_measured``): the
deviation model maps deviations to deviations, so it cannot give the sensors' absolute values
and a request that reports or reads them must give them (without measured outputs of their own
they are ``z0``).  With
it, a request's values are absolute: :func:`to_deviations` subtracts the operating point from
each (input limits, the initial input and the input targets by ``u0``; output limits, zone
edges, setpoints and the initial setpoint by ``z0``; measured disturbance values by ``d0``;
no request value is in the measured outputs' units: noise is a difference) and drops the block, so the rest of the pipeline sees the deviation request it always saw;
:func:`design_to_absolute` and
:func:`simulation_to_absolute` add it back to every absolute value of the answer (the measured
series by ``y0``).  Moves,
additive disturbances, offsets and figures of merit are differences and stay as they are.
Each shift is one IEEE subtraction or addition per value, so the absolute run is the
deviation run shifted by the operating point, bit for bit.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TypeVar

from service.errors import FieldProblem, InvalidRequest
from service.pipeline.caps import Caps
from service.pipeline.plant import DiscretePlant, plant_arrays
from service.pipeline.problems import pointer
from service.schemas.design import DesignRequest, DesignResponse
from service.schemas.export import ExportRequest
from service.schemas.simulate import SimulateRequest, SimulateResponse

T = TypeVar("T")

__all__ = [
    "OperatingPointValues",
    "check_operating_point",
    "checked_at_point",
    "design_to_absolute",
    "explain_failure",
    "simulation_to_absolute",
    "to_deviations",
]


@dataclass(frozen=True)
class OperatingPointValues:
    """``u0``, ``z0``, ``d0`` and ``y0`` as given (a missing list is zeros of the right length later).

    ``measured`` (``y0``) holds the steady values of measured outputs of their own; without
    them the measured outputs are the controlled ones and their values are ``z0``.
    """

    inputs: tuple[float, ...] | None
    outputs: tuple[float, ...] | None
    disturbances: tuple[float, ...] | None
    measured: tuple[float, ...] | None = None

    def input(self, j: int) -> float:
        return 0.0 if self.inputs is None else self.inputs[j]

    def output(self, i: int) -> float:
        return 0.0 if self.outputs is None else self.outputs[i]

    def disturbance(self, k: int) -> float:
        return 0.0 if self.disturbances is None else self.disturbances[k]

    def measured_values(self, plant: DiscretePlant) -> list[float]:
        """``y0`` of each measured output: ``measured`` for measured outputs of their own, else ``z0``.

        Only for a plant whose operating point :func:`check_operating_point` accepted.
        """
        if plant.measured_own:
            assert self.measured is not None and len(self.measured) == plant.c_measured.shape[0]
            return list(self.measured)
        return [self.output(i) for i in range(len(plant.outputs))]


def _minus(values: Sequence[float | None] | None, point: tuple[float, ...] | None) -> list[float | None] | None:
    if values is None or point is None or len(values) != len(point):
        return None if values is None else list(values)
    return [None if v is None else v - p for v, p in zip(values, point, strict=True)]


def to_deviations(request: DesignRequest) -> tuple[DesignRequest, OperatingPointValues | None]:
    """Return the request in deviations from its operating point, and the operating point.

    A request without ``model.operating_point`` comes back unchanged with ``None``.  Lists of
    the wrong length are left alone here; :func:`check_operating_point` reports them.
    """
    op = request.model.operating_point
    if op is None:
        return request, None
    point = OperatingPointValues(
        inputs=None if op.inputs is None else tuple(op.inputs),
        outputs=None if op.outputs is None else tuple(op.outputs),
        disturbances=None if op.disturbances is None else tuple(op.disturbances),
        measured=None if op.measured is None else tuple(op.measured),
    )
    update: dict[str, object] = {"model": request.model.model_copy(update={"operating_point": None})}
    if request.zones is not None and point.outputs is not None and len(request.zones) == len(point.outputs):
        update["zones"] = [
            None
            if zone is None
            else zone.model_copy(
                update={
                    "low": None if zone.low is None else zone.low - z0,
                    "high": None if zone.high is None else zone.high - z0,
                }
            )
            for zone, z0 in zip(request.zones, point.outputs, strict=True)
        ]
    limits = request.limits
    if limits is not None:
        update["limits"] = limits.model_copy(
            update={
                "input_min": _minus(limits.input_min, point.inputs),
                "input_max": _minus(limits.input_max, point.inputs),
                "output_min": _minus(limits.output_min, point.outputs),
                "output_max": _minus(limits.output_max, point.outputs),
            }
        )
    if isinstance(request, SimulateRequest):
        sc = request.scenario
        initial = sc.initial.model_copy(
            update={
                "input": _minus(sc.initial.input, point.inputs),
                "setpoint": _minus(sc.initial.setpoint, point.outputs),
            }
        )
        update["scenario"] = sc.model_copy(
            update={
                "setpoint_changes": [
                    e.model_copy(update={"setpoint": _minus(e.setpoint, point.outputs)}) for e in sc.setpoint_changes
                ],
                "measured_disturbances": [
                    e.model_copy(update={"value": _minus(e.value, point.disturbances)})
                    for e in sc.measured_disturbances
                ],
                "input_targets": _minus(sc.input_targets, point.inputs),
                "input_target_changes": [
                    e.model_copy(update={"value": _minus(e.value, point.inputs)}) for e in sc.input_target_changes
                ],
                "initial": initial,
            }
        )
    return request.model_copy(update=update), point


def check_operating_point(request: DesignRequest, point: OperatingPointValues, plant: DiscretePlant) -> None:
    """Raise :class:`InvalidRequest` for an operating point of the wrong size or outside the limits.

    ``request`` is the request in deviations (:func:`to_deviations`): a limit excludes the
    operating point when its deviation has the wrong sign.

    The linear model holds at the operating point, so that point must satisfy the request's
    own limits; a limit that excludes it is refused with a sentence that says so.
    """
    problems: list[FieldProblem] = []
    sizes = (
        ("inputs", point.inputs, plant.inputs, "manipulated variables"),
        ("outputs", point.outputs, plant.outputs, "controlled outputs"),
        ("disturbances", point.disturbances, plant.disturbances, "measured disturbances"),
    )
    for name, values, signals, what in sizes:
        if values is not None and len(values) != len(signals):
            problems.append(
                FieldProblem(
                    pointer("model", "operating_point", name),
                    f"needs one value per {what[:-1]} ({len(signals)}), got {len(values)}",
                )
            )
    # A steady state is a whole: with one list alone the others' values would be deviations
    # from the model's origin while the given ones are absolute (a setpoint of 358 degC read as a
    # step of 358 degC), a silently wrong run.
    given = [(name, what) for name, values, signals, what in sizes if values is not None and signals]
    for name, values, signals, what in sizes:
        if values is None and signals and given:
            other, other_what = given[0]
            problems.append(
                FieldProblem(
                    pointer("model", "operating_point", name),
                    f"the operating point gives the {other_what}' values ({other}) but not the {what}': their "
                    f"values in this request and its answer would then be deviations from the model's origin "
                    f"while the {other_what}' are absolute. Give one value per {what[:-1]} ({len(signals)}), "
                    f"its steady value at this operating point",
                )
            )
    py = int(plant.c_measured.shape[0])
    full_state = isinstance(request, ExportRequest) and request.estimator.kind == "full_state"
    if point.measured is not None and not plant.measured_own:
        problems.append(
            FieldProblem(
                pointer("model", "operating_point", "measured"),
                "this model measures its controlled outputs (it has no c_measured or d_measured of its own), whose "
                "operating values are operating_point.outputs; leave measured out",
            )
        )
    elif point.measured is not None and len(point.measured) != py:
        problems.append(
            FieldProblem(
                pointer("model", "operating_point", "measured"),
                f"needs one value per measured output ({py}, the rows of c_measured), got {len(point.measured)}",
            )
        )
    elif (
        point.measured is None
        and plant.measured_own
        and (isinstance(request, SimulateRequest) or (isinstance(request, ExportRequest) and not full_state))
    ):
        what = "the run would report" if isinstance(request, SimulateRequest) else "the law would read"
        problems.append(
            FieldProblem(
                pointer("model", "operating_point", "measured"),
                f"{what} the measured outputs (c_measured, d_measured) in absolute units, but their operating "
                f"values cannot be derived: the model maps deviations to deviations, so at the operating point "
                f"every measured deviation is zero whatever the sensors read. Give operating_point.measured, the "
                f"{py} sensor value(s) at the operating point (engineering units), or leave operating_point out",
            )
        )
    if full_state:
        problems.append(
            FieldProblem(
                pointer("model", "operating_point"),
                "the law would read the plant states a full_state law reads in absolute units, but "
                "operating_point gives no values for them (it holds the inputs', controlled outputs', measured "
                "disturbances' and measured outputs' only). Export this law in deviations (leave operating_point "
                "out)",
            )
        )
    if isinstance(request, SimulateRequest) and request.scenario.true_plant is not None:
        if request.scenario.true_plant.operating_point is not None:
            problems.append(
                FieldProblem(
                    pointer("scenario", "true_plant", "operating_point"),
                    "the true plant runs around the model's operating point; leave its own out",
                )
            )
    limits = request.limits
    if limits is not None and not problems:
        checks = (
            ("input_min", limits.input_min, point.inputs, plant.inputs, "below"),
            ("input_max", limits.input_max, point.inputs, plant.inputs, "above"),
            ("output_min", limits.output_min, point.outputs, plant.outputs, "below"),
            ("output_max", limits.output_max, point.outputs, plant.outputs, "above"),
        )
        for name, deviations, values, signals, side in checks:
            if deviations is None or values is None or len(deviations) != len(values):
                continue
            for i, dev in enumerate(deviations):
                if dev is None:
                    continue
                excluded = dev > 0.0 if side == "below" else dev < 0.0
                if excluded:
                    limit = dev + values[i]
                    problems.append(
                        FieldProblem(
                            pointer("limits", name, i),
                            f"this limit ({limit:g}) excludes the operating point of '{signals[i].name}' "
                            f"({values[i]:g}), where the linear model holds: the operating point lies {side} "
                            f"it. Move the limit or the operating point",
                        )
                    )
    if problems:
        raise InvalidRequest(problems)


def explain_failure(request: DesignRequest, point: OperatingPointValues | None, caps: Caps) -> None:
    """When a request with an operating point failed its checks, say first if the point is the cause.

    Raises :class:`InvalidRequest` about the operating point (its size, a limit that excludes
    it) when there is such a problem; returns otherwise, and the caller re-raises its own.
    ``request`` is the request in deviations.
    """
    if point is None:
        return
    plant, _ = plant_arrays(request.model, caps)
    if plant is not None:
        check_operating_point(request, point, plant)


def checked_at_point(
    check: Callable[[], T], request: DesignRequest, point: OperatingPointValues | None, caps: Caps
) -> T:
    """Return ``check()``; when it fails and ``point`` is given, say first if the point is the cause.

    ``request`` is the request in deviations that ``check`` checks (:func:`explain_failure`).
    """
    try:
        return check()
    except InvalidRequest:
        explain_failure(request, point, caps)
        raise


def _shift(kind: str, signal: str, value: float, point: OperatingPointValues, plant: DiscretePlant) -> float:
    if kind == "input":
        return value + point.input([s.name for s in plant.inputs].index(signal))
    if kind == "output":
        return value + point.output([s.name for s in plant.outputs].index(signal))
    return value  # a move is a difference


def design_to_absolute(response: DesignResponse, point: OperatingPointValues, plant: DiscretePlant) -> None:
    """Add the operating point to the absolute values of a /design answer (in place)."""
    names = [s.name for s in plant.outputs]
    for zone in response.zones or []:
        z0 = point.output(names.index(zone.output))
        zone.low = None if zone.low is None else zone.low + z0
        zone.high = None if zone.high is None else zone.high + z0
    check = response.limit_check
    if check is not None:
        for v in check.violations:
            v.value = _shift(v.kind, v.signal, v.value, point, plant)
            v.limit = _shift(v.kind, v.signal, v.limit, point, plant)


def simulation_to_absolute(response: SimulateResponse, point: OperatingPointValues, plant: DiscretePlant) -> None:
    """Add the operating point to every absolute series and limit value of a /simulate answer (in place)."""
    p, m, md = len(plant.outputs), len(plant.inputs), len(plant.disturbances)
    z0 = [point.output(i) for i in range(p)]
    u0 = [point.input(j) for j in range(m)]
    d0 = [point.disturbance(k) for k in range(md)]
    response.outputs = [[v + z0[i] for i, v in enumerate(row)] for row in response.outputs]
    y0 = point.measured_values(plant)  # the sensors' own values, or the controlled outputs'
    response.measured = [[v + y0[i] for i, v in enumerate(row)] for row in response.measured]
    response.setpoints = [[v + z0[i] for i, v in enumerate(row)] for row in response.setpoints]
    response.inputs = [[v + u0[j] for j, v in enumerate(row)] for row in response.inputs]
    response.measured_disturbances = [[v + d0[k] for k, v in enumerate(row)] for row in response.measured_disturbances]
    design_to_absolute(response.design, point, plant)
    names = [s.name for s in plant.outputs]
    for zone in response.zones or []:
        shift = z0[names.index(zone.output)]
        zone.low = None if zone.low is None else zone.low + shift
        zone.high = None if zone.high is None else zone.high + shift
    if response.limits is not None:
        for step in response.limits.steps:
            if step.target is not None:
                step.target = [v + z0[i] for i, v in enumerate(step.target)]
    if response.limit_summary is not None:
        for signal in response.limit_summary.signals:
            signal.limit = _shift(signal.kind, signal.signal, signal.limit, point, plant)
