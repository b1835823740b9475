"""The peak memory of a whole request, estimated from its sizes before it runs, and its 422.

:func:`request_memory` covers every compute request: /design (and a batch item), /design/export,
/design/compare, /design/sweep, /design/batch, /simulate and /identify.  It adds up, from the
sizes alone (:func:`service.pipeline.caps.model_sizes`), what the request holds at its peak
(``service.pipeline.estimates``): the design's arrays and its answer, the run's series, the move
QP, the frequency analysis, the identification's columns and Hankel matrices.  Work done one
after another (sweep values, batch items, the two sides of a comparison) counts its largest
peak, plus every answer that is kept until the end.

:func:`check_request_memory` refuses a request whose estimate exceeds
``Caps.max_request_memory_bytes`` with a 422 naming the fields that drive it (``/scenario/steps``,
``/horizons/prediction``, ``/values``, ``/items``, ``/data`` ...).  The compute lanes also read
the estimate (``service.api.compute``): a request above :data:`HEAVY_MEMORY_BYTES` runs in the
heavy lane whatever its work, so the light lane's processes stay small.

Each estimate also says what the request's answer holds in the serving process while it is
sent (``MemoryEstimate.served``); an answer past ``Caps.max_answer_memory_bytes`` alone is a 422
naming the same fields, and ``service.api.answer_memory`` makes the answers in flight share
that many bytes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

from pydantic import BaseModel, ValidationError

from service.errors import FieldProblem, InvalidRequest
from service.pipeline.caps import Caps, model_sizes
from service.pipeline.estimates import (
    answer_memory_bytes,
    design_memory_bytes,
    frequency_memory_bytes,
    identify_memory_bytes,
    served_answer_bytes,
    simulation_memory_bytes,
)
from service.pipeline.identify import STEP_RESPONSE_SAMPLES
from service.schemas.batch import BatchRequest
from service.schemas.compare import CompareRequest
from service.schemas.design import DesignRequest
from service.schemas.export import ExportRequest
from service.schemas.identify import IdentifyRequest
from service.schemas.model import StateSpaceModel
from service.schemas.simulate import ScenarioRequest, SimulateRequest
from service.schemas.sweep import HORIZON_PARAMETERS, SweepRequest

__all__ = ["HEAVY_MEMORY_BYTES", "MemoryEstimate", "check_request_memory", "request_memory"]

#: A request estimated above this many bytes runs in the heavy lane whatever its work (the light
#: lane's processes then stay within it; see ``tests/api/test_memory_bound.py`` for the pod's sum).
HEAVY_MEMORY_BYTES = 32 * 1024 * 1024

_MIB = 1024 * 1024


@dataclass(frozen=True)
class MemoryEstimate:
    """Peak bytes of a request and the JSON pointers of the fields that drive them (largest first).

    ``bytes`` is the peak in the compute process; ``served`` the bytes the serving process holds
    for the answer, from the solver's reply to its last byte sent
    (:func:`service.pipeline.estimates.served_answer_bytes`).
    """

    bytes: float
    fields: tuple[str, ...]
    what: str
    served: float = 0.0


def _disturbance_states(request: DesignRequest, inputs: int, outputs: int) -> int:
    kind = request.estimator.kind
    if kind == "full_state":
        return 0
    if kind == "input_disturbance":
        return inputs
    return outputs  # per_output, output_disturbance, kalman (at most one per output or input)


def _measured_disturbances(request: DesignRequest) -> int:
    model = request.model
    if isinstance(model, StateSpaceModel):
        return len(model.b_disturbance[0]) if model.b_disturbance else 0
    return len(model.disturbances or [])


def _design(request: DesignRequest) -> tuple[int, int]:
    """Peak bytes of one design with its answer, and the answer's numbers."""
    n, m, p = model_sizes(request.model)
    h = request.horizons
    penalized = max(h.prediction - h.first_penalized + 1, 1)
    nd = _disturbance_states(request, m, max(p, _measured_outputs(request, p)))
    md = _measured_disturbances(request)
    # Kh, Kx, Ku, Kr, Kd, labels, poles of the loop with its estimator, the plant's diagnostics
    numbers = m * (penalized * p + n + m + p + md) + 4 * (n + nd + m) + 2 * (n + m + p) ** 2
    answer = answer_memory_bytes(numbers)
    peak = design_memory_bytes(states=n, inputs=m, outputs=p, penalized_steps=penalized, control=h.control) + answer
    if request.analysis.frequency:
        peak += frequency_memory_bytes(points=request.analysis.points, states=2 * n + nd + m, loops=max(m, p))
    study = request.analysis.model_error
    if study is not None:
        longest = max(study.extra_dead_time, default=0)
        size = 2 * n + nd + 2 * m + longest * min(m, p)
        cases = len(study.gain_factors) * len(study.extra_dead_time) + len(study.input_gain_factors)
        peak += 8 * 4 * size * size + answer_memory_bytes(8 * cases + m * len(study.input_gain_factors))
    return peak, numbers


def _measured_outputs(request: DesignRequest, outputs: int) -> int:
    model = request.model
    if isinstance(model, StateSpaceModel) and model.c_measured:
        return len(model.c_measured)
    return outputs


def _run(request: DesignRequest, scenario: ScenarioRequest, design_peak: int) -> tuple[int, int]:
    """Peak bytes of one run on top of its design, and the numbers of its series and report."""
    n, m, p = model_sizes(request.model)
    py = _measured_outputs(request, p)
    nt = model_sizes(scenario.true_plant)[0] if scenario.true_plant is not None else n
    nd = _disturbance_states(request, m, max(p, py))
    md = _measured_disturbances(request)
    per_step = 3 * p + 2 * py + 3 * m + n + nd + md + nt + 2  # the series kept, the noise, the time
    answered = 1 + 2 * p + py + m + n + nd + md  # a step's time, outputs, measured, setpoints, inputs, estimates
    qp_entries = report = 0
    if request.limits is not None or request.zones is not None:
        h = request.horizons
        variables = h.control * m + 2 * p * (h.prediction + 1)
        rows = 4 * h.control * m + 2 * h.prediction * p + 2 * p * (h.prediction + 1)
        qp_entries = variables * (variables + rows)
        report = scenario.steps * (8 + 3 * m + 4 * p)
    peak = simulation_memory_bytes(
        design_bytes=design_peak,
        steps=scenario.steps,
        numbers_per_step=per_step,
        qp_entries=qp_entries,
        report_numbers=report,
    )
    return peak, scenario.steps * answered + report


def _law_numbers(request: DesignRequest) -> int:
    """Numbers of an exported law: the controller with its estimator as one state-space system."""
    n, m, p = model_sizes(request.model)
    size = n + _disturbance_states(request, m, max(p, _measured_outputs(request, p))) + m + p
    size += _measured_disturbances(request)
    return 4 * size * size


def _design_request(request: DesignRequest, where: str = "") -> MemoryEstimate:
    peak, numbers = _design(request)
    if isinstance(request, ExportRequest):  # the law's matrices or its source, from the model
        served = served_answer_bytes(_law_numbers(request), written_by_solver=False)
    else:  # /design: the solver writes the JSON
        served = served_answer_bytes(numbers, written_by_solver=True)
    fields = (f"{where}/horizons/control", f"{where}/horizons/prediction")
    return MemoryEstimate(peak, fields, "this design", served)


def _simulate_request(request: SimulateRequest) -> MemoryEstimate:
    peak, numbers = _design(request)
    total, series = _run(request, request.scenario, peak)
    served = served_answer_bytes(numbers + series, written_by_solver=True)  # JSON or CSV, written by the solver
    fields = ("/scenario/steps", "/horizons/prediction", "/horizons/control")
    return MemoryEstimate(total, fields, "this run", served)


def _sweep_request(request: SweepRequest) -> MemoryEstimate:
    design = request.design
    if request.parameter in HORIZON_PARAMETERS and request.values:
        largest = int(min(max(request.values), 10**9))
        horizons = design.horizons.model_copy(update={request.parameter: largest})
        design = design.model_copy(update={"horizons": horizons})
    peak, _ = _design(design)
    if request.scenario is not None:
        peak, _ = _run(design, request.scenario, peak)
    # one value at a time; every entry keeps a few dozen numbers
    total = peak + answer_memory_bytes(64 * len(request.values))
    fields = ("/values", "/design/horizons/prediction", "/design/horizons/control")
    if request.scenario is not None:
        fields = ("/values", "/scenario/steps", "/design/horizons/prediction")
    served = served_answer_bytes(64 * len(request.values), written_by_solver=False)
    return MemoryEstimate(total, fields, "this sweep", served)


def _batch_request(request: BatchRequest) -> MemoryEstimate:
    largest = kept = 0
    for item in request.items:
        try:
            design = item.design_request()
        except ValidationError:
            continue  # answered as that item's own problem
        peak, numbers = _design(design)
        largest = max(largest, peak)
        kept += numbers  # every designed item's answer stays until the batch is answered
    served = served_answer_bytes(kept, written_by_solver=False, answers=len(request.items))
    return MemoryEstimate(largest + answer_memory_bytes(kept), ("/items",), "this batch", served)


def _compare_request(request: CompareRequest) -> MemoryEstimate:
    sides = [_design(request.in_service), _design(request.proposed)]
    peak = max(p for p, _ in sides) + sum(answer_memory_bytes(a) for _, a in sides)
    numbers = sum(a for _, a in sides)
    if request.scenario is not None:
        runs = [_run(side, request.scenario, 0) for side in (request.in_service, request.proposed)]
        peak += sum(p for p, _ in runs)  # both runs are compared at the end
        numbers += sum(s for _, s in runs)
    fields = ("/scenario/steps", "/proposed/horizons/prediction", "/in_service/horizons/prediction")
    served = served_answer_bytes(numbers, written_by_solver=False, answers=2)
    return MemoryEstimate(peak, fields if request.scenario is not None else fields[1:], "this comparison", served)


def _identify_request(request: IdentifyRequest) -> MemoryEstimate:
    longest = max((len(column) for column in request.data.values()), default=0)
    samples = longest
    if request.time is not None and len(request.time) > 1:
        span = (max(request.time) - min(request.time)) / request.sample_time
        samples = max(samples, int(min(span, 1e12)) + 1)
    columns = len(request.inputs) + len(request.disturbances) + len(request.outputs)
    block_rows = 0
    if request.structure == "subspace":
        block_rows = request.block_rows if request.block_rows is not None else 20
    total = identify_memory_bytes(samples=samples, columns=columns, outputs=len(request.outputs), block_rows=block_rows)
    fields = ("/data", "/block_rows") if block_rows else ("/data",)
    if request.time is not None:
        fields = (*fields, "/time", "/sample_time")
    # per pair a step response (at most STEP_RESPONSE_SAMPLES times and values) and its
    # residual correlations; the model's matrices
    pairs = (len(request.inputs) + len(request.disturbances)) * len(request.outputs)
    numbers = pairs * (2 * STEP_RESPONSE_SAMPLES + 3 * (request.correlation_lags + 1)) + 4 * columns * columns
    served = served_answer_bytes(numbers, written_by_solver=False)
    return MemoryEstimate(total, fields, "this identification", served)


def request_memory(request: BaseModel) -> MemoryEstimate | None:
    """The peak-memory estimate of a validated request model (None for any other kind).

    Sizes past any cap count as infinite bytes (a request refused by its caps anyway).
    """
    try:
        if isinstance(request, SimulateRequest):
            return _simulate_request(request)
        if isinstance(request, DesignRequest):  # /design, /design/export and batch items
            return _design_request(request)
        if isinstance(request, SweepRequest):
            return _sweep_request(request)
        if isinstance(request, BatchRequest):
            return _batch_request(request)
        if isinstance(request, CompareRequest):
            return _compare_request(request)
        if isinstance(request, IdentifyRequest):
            return _identify_request(request)
    except OverflowError:
        return MemoryEstimate(math.inf, (), "this request")
    return None


def _design_past_caps(request: DesignRequest, caps: Caps) -> bool:
    n, m, p = model_sizes(request.model)
    if n > caps.max_states or max(m, p) > caps.max_signals or request.horizons.prediction > caps.max_prediction_horizon:
        return True
    study = request.analysis.model_error
    if study is not None:
        cases = len(study.gain_factors) * len(study.extra_dead_time) + len(study.input_gain_factors)
        longest = max(study.extra_dead_time, default=0)
        if cases > caps.max_model_error_cases or n + longest * min(m, p) > caps.max_states:
            return True
    if isinstance(request, SimulateRequest):
        return _scenario_past_caps(request.scenario, caps)
    return False


def _scenario_past_caps(scenario: ScenarioRequest, caps: Caps) -> bool:
    if scenario.steps > caps.max_simulation_steps:
        return True
    return scenario.true_plant is not None and model_sizes(scenario.true_plant)[0] > caps.max_states


def _past_size_caps(request: BaseModel, caps: Caps) -> bool:
    """Whether the request passes a size cap that its own check names (see :func:`check_request_memory`)."""
    if isinstance(request, DesignRequest):
        return _design_past_caps(request, caps)
    if isinstance(request, SweepRequest):
        horizons = request.parameter in HORIZON_PARAMETERS and max(request.values) > caps.max_prediction_horizon
        scenario = request.scenario is not None and _scenario_past_caps(request.scenario, caps)
        return (
            horizons
            or scenario
            or len(request.values) > caps.max_sweep_values
            or _design_past_caps(request.design, caps)
        )
    if isinstance(request, CompareRequest):
        scenario = request.scenario is not None and _scenario_past_caps(request.scenario, caps)
        return scenario or _design_past_caps(request.in_service, caps) or _design_past_caps(request.proposed, caps)
    if isinstance(request, IdentifyRequest):
        return max((len(c) for c in request.data.values()), default=0) > caps.max_identify_samples
    return False


def check_request_memory(request: BaseModel, caps: Caps) -> MemoryEstimate | None:
    """Refuse a request whose estimated peak memory exceeds ``caps.max_request_memory_bytes``,
    or whose answer alone would exceed ``caps.max_answer_memory_bytes`` in the serving process.

    A request past one of the size caps (states, signals, prediction horizon, steps, samples,
    values) is left to the check that names that field: its estimate only sends it to the
    heavy lane, where the pipeline refuses it before computing anything (so it holds no
    answer memory: ``served`` is 0).

    Raises
    ------
    InvalidRequest
        422, one entry per field that drives the estimate, each saying the estimate and the cap.
    """
    estimate = request_memory(request)
    if estimate is None:
        return None
    if _past_size_caps(request, caps):  # refused before it computes anything: it holds no answer
        return replace(estimate, served=0.0)
    if estimate.bytes > caps.max_request_memory_bytes:
        detail = (
            f"{estimate.what} would need about {estimate.bytes / _MIB:,.0f} MiB in the compute process, estimated "
            f"from its sizes; this service allows {caps.max_request_memory_bytes / _MIB:,.0f} MiB. Make this field "
            "smaller (steps, horizons, values, items or samples, whichever drives it)"
        )
    elif estimate.served > caps.max_answer_memory_bytes:
        detail = (
            f"the answer of {estimate.what} would take about {estimate.served / _MIB:,.0f} MiB in the serving "
            f"process while it is sent, estimated from its sizes; this service holds at most "
            f"{caps.max_answer_memory_bytes / _MIB:,.0f} MiB of answers at once. Make this field smaller "
            "(steps, horizons, values, items or signals, whichever drives it), or split the request"
        )
    else:
        return estimate
    raise InvalidRequest([FieldProblem(where, detail) for where in estimate.fields or ("",)])
