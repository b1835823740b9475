"""Work estimates of whole requests, from their sizes alone, before anything is computed.

The serving process reads :func:`request_work` of each request to choose its solver lane
(``service.api.compute``): a request above ``MOVECAST_HEAVY_WORK`` operations runs in the
heavy lane, so that small requests never wait behind large ones.  The estimate counts
floating-point operations of the dominant steps (common practice: the leading terms of
the textbook operation counts, Golub and Van Loan, *Matrix Computations*, 4th ed.,
table 1.1.2 and sections 4.2, 7.5, 8.3); it is a scheduling figure, not a bound.

Sizes come from the request as posted: a state-space model's matrices; for a transfer
matrix the lags, integrators and whole samples of dead time of every element (an upper
bound of the realization, which shares delays); for step-response tables one shift register
per input as long as its longest table (before any reduction).
"""

from __future__ import annotations

import math

from pydantic import BaseModel

from service.schemas.design import DesignRequest
from service.schemas.model import StateSpaceModel, TransferMatrixModel
from service.schemas.simulate import SimulateRequest
from service.schemas.step_response import StepResponseModel
from service.schemas.sweep import SweepRequest

__all__ = ["HEAVY_WORK", "design_work", "model_sizes", "request_work"]

#: Default lane threshold (operations): about 20 ms of one core's arithmetic.  The
#: bundled example takes about 1e5, the large benchmark case (200 states, 20 x 20,
#: Hp 200, Hu 50) about 2e9.
HEAVY_WORK = 50_000_000
#: Sizes past any cap are counted as this (the caps reject them in the solver process).
_MOST_STATES = 10**9


def model_sizes(model: StateSpaceModel | TransferMatrixModel | StepResponseModel) -> tuple[int, int, int]:
    """Return ``(states, inputs, outputs)`` of a posted model (see the module notes)."""
    if isinstance(model, StateSpaceModel):
        inputs = len(model.b[0]) if model.b else 0
        return len(model.a), inputs, len(model.c)
    if isinstance(model, StepResponseModel):
        grid = [*model.responses, *(model.disturbance_responses or [])]
        columns = max((len(row) for row in grid), default=0)
        states = 0
        for j in range(columns):  # one shift register per input, as long as its longest table
            lengths = [
                len(pair.coefficients) + int(pair.integrating)
                for row in grid
                if j < len(row) and (pair := row[j]) is not None
            ]
            states += max(lengths, default=0)
        return states, max((len(row) for row in model.responses), default=0), len(model.responses)
    rows = model.elements
    outputs = len(rows)
    inputs = max((len(row) for row in rows), default=0)
    states = 0
    for row in [*rows, *(model.disturbance_elements or [])]:
        for element in row:
            if element is None:
                continue
            delay = element.dead_time / model.sample_time
            samples = math.ceil(delay) if math.isfinite(delay) and delay < _MOST_STATES else _MOST_STATES
            states += len(element.time_constants) + int(element.integrating) + samples
    return states, inputs, outputs


def design_work(*, states: int, inputs: int, outputs: int, prediction: int, control: int) -> int:
    """Estimated operations of one /design (the quantity compared with the heavy-lane threshold).

    The prediction matrices (``Hp`` products ``C A^i`` of ``p x n`` by ``n x n``), the
    Hessian from the block-Toeplitz structure (``Hp p Hu m m``), its Cholesky factor
    (``k^3 / 3``, ``k = Hu m``) and extreme eigenvalues (``4 k^3 / 3`` densely, the bound
    counted), the gains (``Hp p k m``) and the plant's eigenvalue problems (about ``10 n^3``
    each, three of them: poles, closed loop, zeros).
    """
    n, m, p = states, inputs, outputs
    k = control * m
    return int(2 * prediction * p * n * (n + m) + 4 * prediction * p * k * m + 2 * k**3 + 30 * (n + m) ** 3)


def _design_request_work(request: DesignRequest) -> int:
    n, m, p = model_sizes(request.model)
    h = request.horizons
    control = h.control if h.move_steps is None else len(h.move_steps)
    work = design_work(states=n, inputs=m, outputs=p, prediction=h.prediction, control=control)
    if request.analysis.frequency:
        work += 2 * request.analysis.points * (n + p) ** 3
    return work


def request_work(request: BaseModel) -> float:
    """Estimated operations of a /design (or a batch item), /design/sweep or /simulate request.

    Parameters
    ----------
    request : BaseModel
        A validated request model; any other kind counts as 0 (a light request).

    Returns
    -------
    float
        ``inf`` when the sizes are beyond any cap (the request is then refused by the caps in
        its solver process, in the heavy lane).  For /simulate the design plus ``steps`` times the per-step products (the free
        prediction, the move and the plant: ``2 Hp p (n + m) + 2 m Hp p + 4 n (n + m)``);
        a sweep adds up its designs.  Requests that extend the /design request (an export)
        count as their design.
    """
    try:
        if isinstance(request, SimulateRequest):
            n, m, p = model_sizes(request.model)
            rows = request.horizons.prediction * p
            per_step = 2 * rows * (n + m) + 2 * m * rows + 4 * n * (n + m)
            return float(_design_request_work(request) + request.scenario.steps * per_step)
        if isinstance(request, DesignRequest):
            return float(_design_request_work(request))
        if isinstance(request, SweepRequest):
            return float(len(request.values) * _design_request_work(request.design))
    except OverflowError:
        return math.inf
    return 0.0
