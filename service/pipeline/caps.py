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
- robustness: :func:`frequency_work` (one frequency analysis);
- sweep: the sum of the above over its values (``service.pipeline.sweep``).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from service.pipeline.estimator import EstimatorInputs
    from service.pipeline.plant import DiscretePlant

__all__ = [
    "DEFAULT_CAPS",
    "QP_STEP_OVERHEAD",
    "QP_WORK_FACTOR",
    "REFINEMENT_EVALUATIONS",
    "STEP_OVERHEAD",
    "Caps",
    "frequency_work",
    "hessian_size",
    "horizon_gain_entries",
    "limit_report_entries",
    "loop_frequency_work",
    "plant_run_entries",
    "plant_run_work",
    "prediction_entries",
    "qp_step_work",
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
) -> int:
    """Estimated floating-point operations of a run (the quantity capped by ``max_simulation_work``).

    Per step, ``2 x`` the entries of every matrix applied to a vector (see
    ``service.solver.evaluation.simulation``): the free prediction ``Fx_aug`` (Np*p x na), ``Fu`` and
    ``Fd``; the move ``Kh`` (m x Np*p); the true plant ``[A B Bd]`` and ``C``; the estimator's
    ``L``, ``Cy`` and ``[A_aug B_aug]``; plus :data:`STEP_OVERHEAD`.  ``na = n + nd``.
    """
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
        + 2 * p * nt  # true plant and its outputs
        + 2 * na * (na + m + md)
        + 4 * p * na  # estimator update and prediction
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
) -> int:
    """Numbers a run keeps: the series returned (outputs, measured, setpoints, inputs,
    estimates, measured disturbances) and the true plant's states."""
    p, m, n, nd, md, nt = outputs, inputs, states, disturbances, measured_disturbances, true_states
    return steps * (3 * p + m + n + nd + md + nt)


def qp_step_work(
    *, free_moves: int, inputs: int, limited_inputs: int, penalized_steps: int, output_bounds: int, soft: bool
) -> int:
    """Estimated floating-point operations of one QP step (and its target) of a run under limits.

    ``nv = free_moves * inputs (+ output_bounds when soft)`` variables and ``nr = free_moves *
    limited_inputs + penalized_steps * output_bounds`` rows: :data:`QP_WORK_FACTOR` ``x nv x
    (nv + nr)`` plus :data:`QP_STEP_OVERHEAD`.
    """
    nv = free_moves * inputs + (output_bounds if soft else 0)
    nr = free_moves * limited_inputs + penalized_steps * output_bounds
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
    n, m, p = plant.states, plant.input_count, plant.output_count
    full_state = estimator.kind == "full_state"
    nd = {"output": p, "input": m, "none": 0}[estimator.disturbance]
    return frequency_work(
        points=points,
        plant_states=n,
        controller_states=m if full_state else n + nd + m,
        inputs=m,
        measured=n if full_state else p,
    )


def _disturbance_states(plant: DiscretePlant, disturbance: str) -> int:
    return {"output": plant.output_count, "input": plant.input_count, "none": 0}[disturbance]


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
    )
