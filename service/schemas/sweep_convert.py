"""Run a tuning sweep through the /design pipeline, one substituted request per value."""

from __future__ import annotations

from service.errors import FieldProblem, InvalidRequest, NumericalError
from service.schemas.common import Caps, pointer
from service.schemas.design import DesignRequest, WarningReport
from service.schemas.design_convert import check_design_request, compute_design
from service.schemas.fingerprint import fingerprint
from service.schemas.sweep import HORIZON_PARAMETERS, SweepEntryReport, SweepProblem, SweepRequest, SweepResponse

__all__ = ["run_sweep", "substituted_request"]


def _weight(weight: list[float] | list[list[float]], signal: int | None, value: float, size: int) -> list[float] | list[list[float]]:
    if signal is None:
        return [value] * size
    if weight and isinstance(weight[0], list):
        matrix = [list(row) for row in weight]  # type: ignore[arg-type]
        matrix[signal][signal] = value
        return matrix
    diagonal = list(weight)  # type: ignore[arg-type]
    diagonal[signal] = value
    return diagonal


def substituted_request(request: SweepRequest, value: float) -> DesignRequest:
    """The base design request with the swept parameter set to ``value``.

    A weight sweep sets one diagonal entry (``signal``) or every signal's weight (a diagonal);
    a horizon sweep sets the horizon (with move blocking, steps beyond a swept control horizon
    are dropped).
    """
    base = request.design
    if request.parameter in HORIZON_PARAMETERS:
        update: dict[str, object] = {request.parameter: int(value)}
        steps = base.horizons.move_steps
        if request.parameter == "control" and steps is not None:
            update["move_steps"] = [j for j in steps if j < int(value)] or [0]
        return base.model_copy(update={"horizons": base.horizons.model_copy(update=update)})
    field = "move" if request.parameter == "move_weight" else "output"
    weight = getattr(base.weights, field)
    updated = _weight(weight, request.signal, float(value), len(weight))
    return base.model_copy(update={"weights": base.weights.model_copy(update={field: updated})})


def _signal_problem(request: SweepRequest) -> list[FieldProblem]:
    if request.signal is None:
        return []
    field = "move" if request.parameter == "move_weight" else "output"
    size = len(getattr(request.design.weights, field))
    if request.signal >= size:
        return [FieldProblem(pointer("signal"), f"signal {request.signal} does not exist: the {field} weight has {size} entries")]
    return []


def _entry(request: SweepRequest, value: float, caps: Caps) -> SweepEntryReport:
    design_request = substituted_request(request, value)
    mark = fingerprint(design_request)
    try:
        outcome = compute_design(check_design_request(design_request, caps))
    except InvalidRequest as exc:
        problem = SweepProblem(
            type="urn:movecast:problem:invalid-request",
            detail=f"The design with {request.parameter} = {value:g} is invalid.",
            errors=[{"pointer": "/design" + p.pointer, "detail": p.detail} for p in exc.problems],
        )
        return SweepEntryReport(value=value, status="failed", fingerprint=mark, problem=problem)
    except NumericalError as exc:
        problem = SweepProblem(
            type="urn:movecast:problem:numerical-problem",
            detail=exc.detail,
            errors=[{"pointer": "/design" + exc.pointer, "detail": exc.detail}] if exc.pointer else [],
        )
        return SweepEntryReport(value=value, status="failed", fingerprint=mark, problem=problem)
    loop = outcome.design.loop
    return SweepEntryReport(
        value=value,
        status="designed",
        fingerprint=mark,
        spectral_radius=loop.spectral_radius,
        stable=loop.stable,
        condition_number=outcome.design.hessian.condition_number,
        warnings=[WarningReport(code=w.code, message=w.message) for w in outcome.warnings],
    )


def run_sweep(request: SweepRequest, caps: Caps) -> SweepResponse:
    """Design once per value; one failed value never fails the others.

    Raises
    ------
    InvalidRequest
        When the base design request is invalid (pointers under ``/design``) or the sweep itself
        is malformed (too many values, a signal that does not exist).
    NumericalError
        When the base model cannot be sampled.
    """
    try:
        check_design_request(request.design, caps)
    except InvalidRequest as exc:
        raise InvalidRequest([FieldProblem("/design" + p.pointer, p.detail) for p in exc.problems]) from None
    except NumericalError as exc:
        raise type(exc)(exc.detail, pointer="/design" + exc.pointer if exc.pointer else "/design") from None
    problems = _signal_problem(request)
    if len(request.values) > caps.max_sweep_values:
        problems.append(
            FieldProblem(pointer("values"), f"{len(request.values)} values given; a sweep takes at most {caps.max_sweep_values}")
        )
    if problems:
        raise InvalidRequest(problems)
    return SweepResponse(
        parameter=request.parameter,
        signal=request.signal,
        entries=[_entry(request, value, caps) for value in request.values],
    )
