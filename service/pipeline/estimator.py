"""The estimator of a request: its checks, and the solver's estimator on the scaled plant.

Shared by /design (the robustness analysis) and /simulate, so that both build the very same
estimator from the same request: :func:`check_estimator` turns an
:class:`~service.schemas.estimator.EstimatorRequest` into :class:`EstimatorInputs` (collecting
one FieldProblem per broken rule) and :func:`scaled_estimator` designs it on the plant in
scaled signals, the plant the design uses (``service.solver.models.scaling``).

Units.  Covariances are given in engineering units squared; those of the disturbances and
of the measurement noise are scaled with the model's spans (``S^-1 V S^-1``; the measured
outputs' spans for the measurement noise and the output disturbances, which belong to the
measured outputs when the model has measured outputs of its own).  The state is
never scaled, so the process-noise covariance goes in as given.  Default covariances are 1
(0.01 for the states) in each signal's size: its span when it has one, else the natural size
the model gives it (:mod:`service.solver.estimation.sizes`), so that no unit, with or
without spans, moves the default filter.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from service.errors import FieldProblem, NumericalError
from service.pipeline.arrays import check_weight
from service.pipeline.plant import DiscretePlant
from service.pipeline.problems import pointer
from service.schemas.estimator import EstimatorRequest
from service.solver.estimation.estimator import (
    Estimator,
    default_disturbances,
    design_estimator,
    integrating_outputs,
)
from service.solver.estimation.sizes import NaturalSizes, natural_sizes
from service.solver.models.scaling import ScaledPlant
from service.solver.numerics import jacobi_scaled

__all__ = [
    "EstimatorInputs",
    "check_estimator",
    "disturbance_spans",
    "scaled_covariance",
    "scaled_estimator",
    "scaled_measured",
    "signal_sizes",
]

#: The disturbance model each kind but kalman implies.
_IMPLIED = {
    "full_state": "none",
    "per_output": "per_output",
    "output_disturbance": "output",
    "input_disturbance": "input",
}


@dataclass(frozen=True)
class EstimatorInputs:
    """An estimator request after its checks, in engineering units.

    Attributes
    ----------
    kind, disturbance : str
        Estimator kind and its disturbance model (``"per_output"``, ``"output"``, ``"input"``,
        ``"none"``).
    disturbances : tuple of str or None
        For ``"per_output"``: ``"output"`` or ``"rate"`` per output, as given or by default
        from the model's structure.
    process_noise, disturbance_noise, measurement_noise : ndarray or None
        Covariances as given (diagonal ``(k,)`` or full ``(k, k)``); ``None`` for the default.
    """

    kind: str
    disturbance: str
    process_noise: NDArray[np.float64] | None = None
    disturbance_noise: NDArray[np.float64] | None = None
    measurement_noise: NDArray[np.float64] | None = None
    disturbances: tuple[str, ...] | None = None


def _disturbance_problems(
    given: list[str] | None, disturbance: str, plant: DiscretePlant
) -> tuple[tuple[str, ...] | None, list[FieldProblem]]:
    """The per-output disturbance models: as given (checked) or by default from the structure."""
    if disturbance != "per_output":
        if given is None:
            return None, []
        return None, [
            FieldProblem(
                pointer("estimator", "disturbances"),
                "a disturbance model per output needs kind 'per_output' (the default), or 'kalman' with "
                "disturbance 'per_output'",
            )
        ]
    if given is None:
        return default_disturbances(plant.a, plant.c_measured), []
    flags = integrating_outputs(plant.a, plant.c_measured)
    names = [s.name for s in plant.measured]
    if len(given) != len(names):
        which = "measured output" if plant.measured_own else "controlled output"
        return None, [
            FieldProblem(
                pointer("estimator", "disturbances"),
                f"needs one entry per {which} ({len(names)}: {', '.join(names)}), got {len(given)}",
            )
        ]
    problems = [
        FieldProblem(
            pointer("estimator", "disturbances", i),
            f"'{names[i]}' does not integrate (it sees no mode of the model at z = 1), so a bias on its rate "
            f"has nothing to act through; use 'output' for it",
        )
        for i, kind in enumerate(given)
        if kind == "rate" and not flags[i]
    ]
    return tuple(given), problems


#: Smallest eigenvalue of the measurement-noise covariance with unit diagonal
#: (:func:`service.solver.numerics.jacobi_scaled`) that counts as positive definite: below it,
#: some combination of the sensors is noise-free up to the rounding of the given data (the
#: PSD tolerance of :func:`service.pipeline.arrays.check_weight`, common practice).
_DEFINITE_TOLERANCE = 1e-10


def _positive_definite(w: NDArray[np.float64]) -> bool:
    """Whether a covariance (variances ``(k,)`` or a matrix ``(k, k)``) is positive definite, free of units.

    A variance must be above 0; a matrix needs every diagonal entry above 0 and the smallest
    eigenvalue of ``D^-1/2 W D^-1/2`` (``D = diag(W)``: the correlation matrix) above
    :data:`_DEFINITE_TOLERANCE`, so that a change of units moves no verdict (the raw smallest
    eigenvalue of a covariance of a signal of size 1e-3 beside one of size 1 is positive by
    rounding alone when the two are correlated by exactly 1).
    """
    if w.ndim == 1:
        return bool(np.min(w) > 0.0)
    symmetric = 0.5 * (w + w.T)
    if not np.all(np.diag(symmetric) > 0.0):
        return False
    return bool(float(np.linalg.eigvalsh(jacobi_scaled(symmetric))[0]) > _DEFINITE_TOLERANCE)


def check_estimator(request: EstimatorRequest, plant: DiscretePlant) -> tuple[EstimatorInputs, list[FieldProblem]]:
    """Check an estimator request against the plant: kinds, covariance sizes, a positive-definite noise.

    Parameters
    ----------
    request : EstimatorRequest
    plant : DiscretePlant
        The (sampled) model the estimator is for.

    Returns
    -------
    EstimatorInputs, list of FieldProblem
        The inputs are meaningful only when no problem was found; pointers under ``/estimator``.
    """
    est = request
    problems: list[FieldProblem] = []
    if est.kind != "kalman" and est.disturbance is not None:
        problems.append(
            FieldProblem(
                pointer("estimator", "disturbance"),
                f"only a kalman estimator takes a disturbance model; {est.kind} implies "
                f"'{_IMPLIED[est.kind]}'. Leave it out, or use kind 'kalman'",
            )
        )
    disturbance = (est.disturbance or "output") if est.kind == "kalman" else _IMPLIED[est.kind]
    disturbances, found = _disturbance_problems(
        None if est.disturbances is None else list(est.disturbances), disturbance, plant
    )
    problems += found
    covariances: dict[str, NDArray[np.float64] | None] = {
        "process_noise": None,
        "disturbance_noise": None,
        "measurement_noise": None,
    }
    if est.kind == "full_state":
        for name in covariances:
            if getattr(est, name) is not None:
                problems.append(
                    FieldProblem(
                        pointer("estimator", name),
                        "a full_state estimator reads the state and has no filter to tune; leave it out",
                    )
                )
        return EstimatorInputs(kind=est.kind, disturbance=disturbance), problems
    py = plant.c_measured.shape[0]
    nd = {"per_output": py, "output": py, "input": plant.input_count, "none": 0}[disturbance]
    sizes = {
        "process_noise": (plant.states, "process-noise covariance", "model states"),
        "disturbance_noise": (nd, "disturbance-noise covariance", f"{disturbance} disturbances"),
        "measurement_noise": (py, "measurement-noise covariance", "measured outputs"),
    }
    for name, (size, what, of) in sizes.items():
        value = getattr(est, name)
        if value is None:
            continue
        if size == 0:
            problems.append(
                FieldProblem(
                    pointer("estimator", name),
                    "the disturbance model is 'none', so there is no disturbance to give a noise; leave it out",
                )
            )
            continue
        w, found = check_weight(value, ("estimator", name), size=size, what=f"{what} of the {of}")
        problems += found
        if w is not None and name == "measurement_noise" and not _positive_definite(w):
            where = ("estimator", name, int(np.argmin(w))) if w.ndim == 1 else ("estimator", name)
            problems.append(
                FieldProblem(
                    pointer(*where),
                    "the measurement-noise covariance must be positive definite: a noise-free measurement "
                    "(or a noise-free combination of measurements, such as two sensors correlated by 1) "
                    "would ask the filter for an infinite gain. Give every output some noise of its own",
                )
            )
        covariances[name] = w
    return EstimatorInputs(kind=est.kind, disturbance=disturbance, disturbances=disturbances, **covariances), problems


def disturbance_spans(plant: DiscretePlant, disturbance: str) -> NDArray[np.float64]:
    """Spans of the estimated disturbances: the measured outputs' (output and per-output models) or the inputs'."""
    return {"per_output": plant.measured_spans, "output": plant.measured_spans, "input": plant.input_spans}.get(
        disturbance, np.ones(0)
    )


def signal_sizes(plant: DiscretePlant, scaled: ScaledPlant, *, measured: bool) -> NaturalSizes:
    """The natural sizes of the scaled plant's signals, those with spans fixed at 1.

    The sizes the default filter's noises are written in
    (:mod:`service.solver.estimation.sizes`): a signal without a span has the size its model
    gives it, so that its unit decides no verdict.  ``measured``: the sizes of the measured
    outputs (the sensors, for a model with measured outputs of its own), else of the
    controlled outputs.
    """
    if measured:
        c = scaled_measured(plant)[0] if plant.measured_own else scaled.c
        fixed_outputs = [s.spanned for s in plant.measured]
    else:
        c, fixed_outputs = scaled.c, [s.spanned for s in plant.outputs]
    return natural_sizes(
        scaled.a, scaled.b, c, fixed_outputs=fixed_outputs, fixed_inputs=[s.spanned for s in plant.inputs]
    )


def scaled_measured(
    plant: DiscretePlant,
    c_measured: NDArray[np.float64] | None = None,
    d_measured: NDArray[np.float64] | None = None,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """``(Cy / sy, Dy su / sy)``: the measured outputs in scaled signals, by the model's spans.

    ``c_measured`` and ``d_measured`` default to the model's own; a true plant's are scaled
    with the model's spans like the rest of it.
    """
    su, sy = plant.input_spans, plant.measured_spans
    cm = plant.c_measured if c_measured is None else c_measured
    dm = plant.d_measured if d_measured is None else d_measured
    return cm / sy[:, None], dm * su[None, :] / sy[:, None]


def scaled_covariance(value: NDArray[np.float64] | None, span: NDArray[np.float64]) -> NDArray[np.float64] | None:
    """``S^-1 V S^-1`` of a covariance in engineering units (a diagonal stays a diagonal)."""
    if value is None:
        return None
    if value.ndim == 1:
        return value / span**2
    return value / np.outer(span, span)


def scaled_estimator(inputs: EstimatorInputs, plant: DiscretePlant, scaled: ScaledPlant) -> Estimator:
    """Design the estimator on the scaled plant, as /simulate and the robustness analysis use it.

    Parameters
    ----------
    inputs : EstimatorInputs
    plant : DiscretePlant
        The model in engineering units (its spans and tags).
    scaled : ScaledPlant
        The same model in scaled signals (``service.solver.models.scaling.scale_plant``).

    Returns
    -------
    Estimator
        Of ``(scaled.a, scaled.b, scaled.c)``; its gain acts on scaled outputs.

    Raises
    ------
    service.errors.NumericalError
        From :func:`service.solver.estimation.estimator.design_estimator` (an undetectable disturbance
        model, a Riccati equation without a stabilizing solution), or pointer ``/estimator``
        when the gain or poles come out as numbers that are not finite.
    """
    sy = plant.measured_spans
    s_dist = disturbance_spans(plant, inputs.disturbance)
    cm, dm = scaled_measured(plant) if plant.measured_own else (None, None)
    estimator = design_estimator(
        scaled.a,
        scaled.b,
        scaled.c,
        kind=inputs.kind,  # type: ignore[arg-type]
        disturbance=inputs.disturbance if inputs.kind == "kalman" else None,  # type: ignore[arg-type]
        disturbances=inputs.disturbances,  # type: ignore[arg-type]
        process_noise=inputs.process_noise,
        disturbance_noise=scaled_covariance(inputs.disturbance_noise, s_dist),
        measurement_noise=scaled_covariance(inputs.measurement_noise, sy),
        output_labels=[s.name for s in plant.outputs],
        input_labels=[s.name for s in plant.inputs],
        c_measured=cm,
        d_measured=dm,
        measured_labels=[s.name for s in plant.measured],
        # signals with spans have size 1 in the scaled plant; the others get natural sizes
        fixed_outputs=[s.spanned for s in plant.measured],
        fixed_inputs=[s.spanned for s in plant.inputs],
    )
    if not (np.all(np.isfinite(estimator.gain)) and np.all(np.isfinite(estimator.poles))):
        raise NumericalError(
            "The estimator's gain or poles are not finite numbers: the model's numbers are too large "
            "or too small to estimate its state in double precision. Rescale the model",
            field=("estimator",),
        )
    return estimator
