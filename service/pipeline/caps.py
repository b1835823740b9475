"""The service's caps and every estimate of a request's size and work, in one place.

A request is refused up front (422 naming the field) when one of these estimates passes
its cap; the compute time limit then bounds what the estimates miss.  :class:`Caps` holds
the defaults, written only here: ``service.api.settings.Settings`` builds its cap fields
(``MOVECAST_MAX_*``) from them and hands a :class:`Caps` back to the pipeline.

The estimates count floating-point operations (or numbers held) from the sizes alone,
before any computation:

- design: :func:`hessian_size`, :func:`prediction_entries`, :func:`horizon_gain_entries`;
- simulation: :func:`simulation_work` (one run), :func:`run_entries` (the series it returns),
  :func:`qp_step_work` and :func:`limit_report_entries` (a run under limits);
- robustness: :func:`frequency_work` (one frequency analysis), :func:`model_error_work` (the
  loops of ``analysis.model_error``);
- sweep: the sum of the above over its values (``service.pipeline.sweep``);
- scheduling: :func:`request_work` of a whole request, from its sizes alone, chooses its
  compute lane (``service.api.compute``): above ``MOVECAST_HEAVY_WORK`` operations it runs in
  the heavy lane, so that small requests never wait behind large ones (the leading terms of
  the textbook operation counts, Golub and Van Loan, *Matrix Computations*, 4th ed., table
  1.1.2 and sections 4.2, 7.5, 8.3; a scheduling figure, not a bound);
- memory: ``service.pipeline.memory.request_memory``, the peak bytes of any whole request
  (capped by ``max_request_memory_bytes``), also sends a request that holds much to the heavy
  lane, whatever its work.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

from pydantic import BaseModel

from service.schemas.compare import CompareRequest
from service.schemas.design import DesignRequest
from service.schemas.identify import IdentifyRequest
from service.schemas.model import StateSpaceModel, TransferMatrixModel
from service.schemas.simulate import SimulateRequest
from service.schemas.step_response import StepResponseModel
from service.schemas.sweep import SweepRequest

if TYPE_CHECKING:
    from service.pipeline.estimator import EstimatorInputs
    from service.pipeline.plant import DiscretePlant

__all__ = [
    "DEFAULT_CAPS",
    "HEAVY_WORK",
    "IDENTIFY_WORK_PER_PARAMETER",
    "QP_STEP_OVERHEAD",
    "QP_WORK_FACTOR",
    "REFINEMENT_EVALUATIONS",
    "STEP_OVERHEAD",
    "Caps",
    "design_work",
    "frequency_work",
    "hessian_size",
    "horizon_gain_entries",
    "limit_report_entries",
    "loop_frequency_work",
    "model_error_work",
    "model_sizes",
    "plant_run_entries",
    "plant_run_work",
    "prediction_entries",
    "qp_step_work",
    "request_work",
    "run_entries",
    "simulation_work",
]


@dataclass(frozen=True)
class Caps:
    """Size caps a request must respect, so that no request can exhaust memory or time.

    Built by the API from its settings; the defaults here are the service's defaults.
    """

    #: Largest state count of a model (also after dead times become states).
    max_states: int = 500
    #: Most inputs or outputs (or measured disturbances) of a model.
    max_signals: int = 100
    #: Longest prediction horizon Hp, in samples.
    max_prediction_horizon: int = 2000
    #: Largest Hessian, ``moves x inputs`` square (:func:`hessian_size`).
    max_hessian_size: int = 4000
    #: Entries of the stacked prediction matrices ``[Fx Fu G]`` (8 bytes each;
    #: :func:`prediction_entries`).
    max_prediction_entries: int = 25_000_000
    #: Peak bytes of one design in the compute process
    #: (``service.pipeline.estimates.design_memory_bytes``).  The default leaves room, inside
    #: the 1280 MiB memory limit of ``deploy/``, for the serving process, the fork server and the
    #: compute process's own interpreter and libraries (about 475 MB together, measured).
    max_design_memory_bytes: int = 384 * 1024 * 1024
    #: Peak bytes of a whole request in the compute process, its answer included
    #: (``service.pipeline.memory.request_memory``: runs, sweeps, batches, comparisons,
    #: identifications); the same room inside the pod as the design cap.
    max_request_memory_bytes: int = 384 * 1024 * 1024
    #: Bytes of answers the serving process holds at once, each from its solver's reply to its
    #: last byte sent (``MemoryEstimate.served``; ``service.api.answer_memory``).  The default
    #: holds the largest /design answer :attr:`max_response_entries` allows, alone.
    max_answer_memory_bytes: int = 128 * 1024 * 1024
    #: Entries of the horizon gain ``Kh`` returned in a response, and of any other series
    #: a response returns (:func:`horizon_gain_entries`, :func:`run_entries`).
    max_response_entries: int = 2_000_000
    #: Values in one tuning sweep.
    max_sweep_values: int = 50
    #: Longest simulated run of POST /simulate, in steps.
    max_simulation_steps: int = 100_000
    #: Estimated work of one simulated run (:func:`simulation_work`; under limits
    #: :func:`qp_step_work` per step).  The default is about 5 s of one core at 1 GFLOP/s, a
    #: rough rate for matrix-vector products this small.
    max_simulation_work: int = 5_000_000_000
    #: Estimated work of one frequency analysis (``analysis.frequency`` of /design;
    #: :func:`frequency_work`); the same rough 5 s.
    max_frequency_work: int = 5_000_000_000
    #: Loops one ``analysis.model_error`` of /design analyses (gain factors times extra dead times).
    max_model_error_cases: int = 100
    #: Estimated work of one ``analysis.model_error`` (:func:`model_error_work`); the same rough 5 s.
    max_model_error_work: int = 5_000_000_000
    #: Most samples per column of one POST /identify (after resampling).
    max_identify_samples: int = 100_000
    #: Estimated work of one POST /identify: samples times fitted parameters times
    #: ``service.pipeline.identify.WORK_PER_PARAMETER`` (simulated samples per parameter over the
    #: starts, iterations and Jacobians); the default is some 10 s of one core.
    max_identify_work: int = 2_000_000_000


#: The service's defaults.
DEFAULT_CAPS = Caps()

#: The interpreter's own cost of one simulated step, counted as this many floating-point
#: operations in :func:`simulation_work` (a step of a small plant takes some tens of
#: microseconds whatever its products cost).
STEP_OVERHEAD = 30_000

#: The interpreter's and the solver interface's own cost of one QP step and one target
#: calculation, counted as this many floating-point operations (a rough fit to
#: ``tests/bench/bench_qp.py``: about 0.2 ms per step of a small QP).
QP_STEP_OVERHEAD = 200_000

#: Operations per step counted per entry of the QP's matrices ``[H; rows]``: the checks of
#: the unconstrained optimum plus some tens of active-set iterations (a rough fit to the
#: same benchmark, warm-started).
QP_WORK_FACTOR = 12

#: Single-frequency evaluations of the loop the refinements of peaks, bandwidth and
#: crossovers add to the grid, counted per break point in :func:`frequency_work` (a bound
#: of what bounded Brent and ``brentq`` take at their tolerances, common practice).
REFINEMENT_EVALUATIONS = 30


def hessian_size(*, moves: int, inputs: int) -> int:
    """Rows (and columns) of the Hessian ``G'QG + R``: one per free move of each input."""
    return moves * inputs


def prediction_entries(*, penalized_steps: int, outputs: int, states: int, inputs: int, control: int) -> int:
    """Entries of the stacked prediction matrices ``[Fx Fu G]``.

    ``penalized_steps * p`` rows; ``n`` columns of ``Fx``, ``m`` of ``Fu`` and ``Hu * m`` of ``G``.
    """
    return penalized_steps * outputs * (states + inputs + control * inputs)


def horizon_gain_entries(*, penalized_steps: int, outputs: int, inputs: int) -> int:
    """Entries of the horizon gain ``Kh`` (``m x penalized_steps * p``) a design returns."""
    return inputs * penalized_steps * outputs


def simulation_work(
    *,
    steps: int,
    states: int,
    true_states: int,
    inputs: int,
    outputs: int,
    disturbances: int,
    measured_disturbances: int,
    penalized_steps: int,
    measured: int | None = None,
) -> int:
    """Estimated floating-point operations of a run (the quantity capped by ``max_simulation_work``).

    Per step, ``2 x`` the entries of every matrix applied to a vector (see
    ``service.solver.evaluation.simulation``): the free prediction ``Fx_aug`` (Np*p x na), ``Fu`` and
    ``Fd``; the move ``Kh`` (m x Np*p); the true plant ``[A B Bd]`` and ``C``; the estimator's
    ``L``, ``Cy`` and ``[A_aug B_aug]``; plus :data:`STEP_OVERHEAD`.  ``na = n + nd``; ``measured``
    outputs ``py`` (default ``p``).
    """
    py = outputs if measured is None else measured
    n, nt, m, p, nd, md, np_ = (
        states,
        true_states,
        inputs,
        outputs,
        disturbances,
        measured_disturbances,
        penalized_steps,
    )
    na = n + nd
    rows = np_ * p
    per_step = (
        2 * rows * (na + m + md)  # free prediction
        + 2 * m * rows  # du = Kh E
        + 2 * nt * (nt + m + md)
        + 2 * (p + py) * nt  # true plant and its outputs
        + 2 * na * (na + m + md)
        + 4 * py * na  # estimator update and prediction
        + STEP_OVERHEAD
    )
    return steps * per_step


def run_entries(
    *,
    steps: int,
    states: int,
    true_states: int,
    inputs: int,
    outputs: int,
    disturbances: int,
    measured_disturbances: int,
    measured: int | None = None,
) -> int:
    """Numbers a run keeps: the series returned (outputs, measured, setpoints, inputs,
    estimates, measured disturbances) and the true plant's states; ``measured`` outputs ``py``
    (default ``p``)."""
    p, m, n, nd, md, nt = outputs, inputs, states, disturbances, measured_disturbances, true_states
    py = p if measured is None else measured
    return steps * (2 * p + py + m + n + nd + md + nt)


def qp_step_work(
    *,
    free_moves: int,
    inputs: int,
    limited_inputs: int,
    penalized_steps: int,
    output_bounds: int,
    soft: bool,
    zone_slacks: int = 0,
) -> int:
    """Estimated floating-point operations of one QP step (and its target) of a run under limits.

    ``nv = free_moves * inputs (+ output_bounds when soft) + zone_slacks`` variables and ``nr =
    free_moves * limited_inputs + penalized_steps * output_bounds + 2 zone_slacks`` rows:
    :data:`QP_WORK_FACTOR` ``x nv x (nv + nr)`` plus :data:`QP_STEP_OVERHEAD`.
    """
    nv = free_moves * inputs + (output_bounds if soft else 0) + zone_slacks
    nr = free_moves * limited_inputs + penalized_steps * output_bounds + 2 * zone_slacks
    return QP_STEP_OVERHEAD + QP_WORK_FACTOR * nv * (nv + nr)


def limit_report_entries(*, steps: int, inputs: int, outputs: int) -> int:
    """Numbers the per-step limit report of a run can hold, at worst."""
    return steps * (8 + 3 * inputs + 4 * outputs)


def frequency_work(*, points: int, plant_states: int, controller_states: int, inputs: int, measured: int) -> int:
    """Estimated floating-point operations of the analysis (the quantity capped by ``max_frequency_work``).

    Parameters
    ----------
    points : int
        Grid size.
    plant_states, controller_states : int
        ``n`` and ``nc`` (``nc = n + nd + m`` with an estimator, ``m`` for ``full_state``).
    inputs, measured : int
        ``m`` and the measured outputs ``py`` (``n`` for ``full_state``).

    Returns
    -------
    int

    Notes
    -----
    Per break point and frequency (``points`` plus :data:`REFINEMENT_EVALUATIONS`): the plant
    and the controller each evaluated by a complex LU factorization and solve (about
    ``3 k^3 + 8 k^2 r`` real operations for ``k`` states and ``r`` right-hand sides), then
    ``S`` and ``T`` of the loop by a solve, a product and two singular value decompositions
    (about ``50 l^3`` for a loop of size ``l``: ``m`` at the input, ``py`` at the output).
    Memory follows the same sizes: ``points x nc^2`` complex numbers at most.
    """
    n, nc, m, py = plant_states, controller_states, inputs, measured
    systems = 3 * (n**3 + nc**3) + 8 * (n * n * m + nc * nc * py)
    loops = 50 * (m**3 + py**3)
    return (points + REFINEMENT_EVALUATIONS) * (2 * systems + loops)


def loop_frequency_work(plant: DiscretePlant, estimator: EstimatorInputs, *, points: int) -> int:
    """:func:`frequency_work` of the loop of this plant with this estimator (its disturbance model
    sets the controller's state count)."""
    n, m = plant.states, plant.input_count
    py = int(plant.c_measured.shape[0])  # the loop is broken at the measured outputs
    full_state = estimator.kind == "full_state"
    nd = _disturbance_states(plant, estimator.disturbance)
    return frequency_work(
        points=points,
        plant_states=n,
        controller_states=m if full_state else n + nd + m,
        inputs=m,
        measured=n if full_state else py,
    )


def _disturbance_states(plant: DiscretePlant, disturbance: str) -> int:
    py = int(plant.c_measured.shape[0])  # the disturbances belong to the measured outputs
    return {"per_output": py, "output": py, "input": plant.input_count, "none": 0}[disturbance]


def model_error_work(
    plant: DiscretePlant, estimator: EstimatorInputs, *, gain_factors: int, extra_dead_times: Sequence[int]
) -> int:
    """Estimated operations of ``analysis.model_error`` (the quantity capped by ``max_model_error_work``).

    Per factor and extra dead time ``d``: the loop of controller, estimator and perturbed plant
    has ``N = n + d r + na + m`` states (``r = min(m, py)`` per sample of the register, ``py``
    the measured outputs the estimator reads,
    ``na = n + nd`` estimator states, none for ``full_state``); its eigenvalues by the
    Hessenberg QR algorithm cost about ``10 N^3`` (Golub and Van Loan, *Matrix Computations*,
    4th ed., section 7.5.6, eigenvalues only), forming it about ``2 N^2 (n + m)``.
    """
    n, m, py = plant.states, plant.input_count, int(plant.c_measured.shape[0])
    full_state = estimator.kind == "full_state"
    na = 0 if full_state else n + _disturbance_states(plant, estimator.disturbance)
    work = 0
    for d in extra_dead_times:
        size = n + d * min(m, py) + na + m
        work += gain_factors * (10 * size**3 + 2 * size * size * (n + m))
    return work


def _measured_disturbances(plant: DiscretePlant) -> int:
    return 0 if plant.b_disturbance is None else plant.b_disturbance.shape[1]


def plant_run_entries(plant: DiscretePlant, *, true_plant: DiscretePlant | None, disturbance: str, steps: int) -> int:
    """:func:`run_entries` of a run of this plant (and true plant) with this disturbance model."""
    return run_entries(
        steps=steps,
        states=plant.states,
        true_states=plant.states if true_plant is None else true_plant.states,
        inputs=plant.input_count,
        outputs=plant.output_count,
        disturbances=_disturbance_states(plant, disturbance),
        measured_disturbances=_measured_disturbances(plant),
        measured=int(plant.c_measured.shape[0]),
    )


def plant_run_work(
    plant: DiscretePlant, *, true_plant: DiscretePlant | None, disturbance: str, steps: int, penalized_steps: int
) -> int:
    """:func:`simulation_work` of a run of this plant (and true plant) with this disturbance model."""
    return simulation_work(
        steps=steps,
        states=plant.states,
        true_states=plant.states if true_plant is None else true_plant.states,
        inputs=plant.input_count,
        outputs=plant.output_count,
        disturbances=_disturbance_states(plant, disturbance),
        measured_disturbances=_measured_disturbances(plant),
        penalized_steps=penalized_steps,
        measured=int(plant.c_measured.shape[0]),
    )


# --------------------------------------------------------------- request work (lanes)

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
    study = request.analysis.model_error
    if study is not None:
        for d in study.extra_dead_time:
            size = 2 * n + 2 * p + m + d * min(m, p)
            work += len(study.gain_factors) * 10 * size**3
        work += len(study.input_gain_factors) * 10 * (2 * n + 2 * p + m) ** 3
    return work


#: Simulated samples per fitted parameter of an identification (over its starts, iterations and
#: Jacobians), as ``service.pipeline.identify.WORK_PER_PARAMETER`` counts them; a test keeps the two equal.
IDENTIFY_WORK_PER_PARAMETER = 2_000


def _run_work(request: DesignRequest, steps: int) -> int:
    n, m, p = model_sizes(request.model)
    rows = request.horizons.prediction * p
    return steps * (2 * rows * (n + m) + 2 * m * rows + 4 * n * (n + m))


def _identify_request_work(request: IdentifyRequest) -> int:
    samples = max((len(column) for column in request.data.values()), default=0)
    columns = len(request.inputs) + len(request.disturbances)
    outputs = len(request.outputs)
    if request.structure == "subspace":
        rows = 2 * (request.block_rows or 20) * (columns + outputs)
        return 4 * samples * rows * rows  # QR of the block Hankel matrix and its projections
    parameters = outputs * (4 * columns + 2)  # at most four per pair, offset and drift per output
    return samples * parameters * IDENTIFY_WORK_PER_PARAMETER


def request_work(request: BaseModel) -> float:
    """Estimated operations of a /design (or a batch item), /design/sweep, /design/compare, /simulate
    or /identify request.

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
        a sweep adds up its designs, a comparison its two designs and runs; an identification
        counts samples x fitted parameters x :data:`IDENTIFY_WORK_PER_PARAMETER` (the subspace
        method: the QR factorization of its block Hankel matrix).  Requests that extend the
        /design request (an export) count as their design.
    """
    try:
        if isinstance(request, SimulateRequest):
            return float(_design_request_work(request) + _run_work(request, request.scenario.steps))
        if isinstance(request, DesignRequest):
            return float(_design_request_work(request))
        if isinstance(request, SweepRequest):
            return float(len(request.values) * _design_request_work(request.design))
        if isinstance(request, CompareRequest):
            sides = (request.in_service, request.proposed)
            work = sum(_design_request_work(side) for side in sides)
            if request.scenario is not None:
                work += sum(_run_work(side, request.scenario.steps) for side in sides)
            return float(work)
        if isinstance(request, IdentifyRequest):
            return float(_identify_request_work(request))
    except OverflowError:
        return math.inf
    return 0.0
