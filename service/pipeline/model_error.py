"""``analysis.model_error`` of /design: its checks, its work estimate and its report.

:func:`check_model_error` refuses what the study cannot do or what would cost too much (before
anything is computed); :func:`compute_model_error` runs
:func:`service.solver.evaluation.model_error.model_error_study` on the scaled model;
:func:`model_error_report` turns the study into the response block
(:mod:`service.schemas.model_error`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from service.errors import FieldProblem, NumericalError
from service.pipeline.caps import Caps, model_error_work
from service.pipeline.estimator import EstimatorInputs, scaled_measured
from service.pipeline.plant import DiscretePlant
from service.pipeline.problems import pointer
from service.schemas.model_error import (
    ModelErrorCaseReport,
    ModelErrorInputCaseReport,
    ModelErrorRangeReport,
    ModelErrorReport,
    ModelErrorRequest,
)
from service.solver.design.controller import ControllerDesign
from service.solver.design.marginal import MARGINAL_TOLERANCE
from service.solver.estimation.estimator import Estimator
from service.solver.estimation.loop import control_loop
from service.solver.evaluation.model_error import ModelErrorStudy, model_error_study
from service.solver.models.scaling import ScaledPlant

__all__ = ["ModelErrorInputs", "check_model_error", "compute_model_error", "model_error_report"]

_WHERE = ("analysis", "model_error")


@dataclass(frozen=True)
class ModelErrorInputs:
    """The checked ``analysis.model_error``: factors and extra dead times as given."""

    gain_factors: tuple[float, ...]
    extra_dead_times: tuple[int, ...]
    input_gain_factors: tuple[tuple[float, ...], ...] = ()


def check_model_error(
    request: ModelErrorRequest | None, plant: DiscretePlant, estimator: EstimatorInputs, caps: Caps
) -> tuple[ModelErrorInputs | None, list[FieldProblem]]:
    """Check the study against the plant, the estimator and the caps.

    Parameters
    ----------
    request : ModelErrorRequest or None
    plant : DiscretePlant
    estimator : EstimatorInputs
        As checked.
    caps : Caps

    Returns
    -------
    inputs : ModelErrorInputs or None
        ``None`` when not asked or refused.
    problems : list of FieldProblem
    """
    if request is None:
        return None, []
    problems: list[FieldProblem] = []
    factors, delays = tuple(request.gain_factors), tuple(request.extra_dead_time)
    by_input = tuple(tuple(f) for f in request.input_gain_factors)
    full_state = estimator.kind == "full_state"
    cases = len(factors) * len(delays)
    if cases + len(by_input) > caps.max_model_error_cases:
        extra = f" and {len(by_input)} input gain factor vectors" if by_input else ""
        problems.append(
            FieldProblem(
                pointer(*_WHERE, "gain_factors"),
                f"{len(factors)} gain factors times {len(delays)} extra dead times{extra} make "
                f"{cases + len(by_input)} loops to analyse; this service analyses at most "
                f"{caps.max_model_error_cases}. Give fewer factors or dead times",
            )
        )
    for i, vector in enumerate(by_input):
        if len(vector) != plant.input_count:
            problems.append(
                FieldProblem(
                    pointer(*_WHERE, "input_gain_factors", i),
                    f"has {len(vector)} factors; give one per manipulated variable ({plant.input_count}: "
                    f"{', '.join(s.name for s in plant.inputs)})",
                )
            )
    register = min(plant.input_count, int(plant.c_measured.shape[0]))  # on the inputs or the measured outputs
    for i, d in enumerate(delays):
        if d and full_state:
            problems.append(
                FieldProblem(
                    pointer(*_WHERE, "extra_dead_time", i),
                    "a full_state estimator reads the model's own states, which a longer dead time changes; "
                    "give an estimator that reads the outputs (the default per_output), or leave 0 only",
                )
            )
        elif plant.states + d * register > caps.max_states:
            problems.append(
                FieldProblem(
                    pointer(*_WHERE, "extra_dead_time", i),
                    f"{d} extra samples of dead time make a plant of {plant.states + d * register} states "
                    f"({register} per sample); this service accepts at most {caps.max_states}",
                )
            )
    if not problems:
        work = model_error_work(plant, estimator, gain_factors=len(factors), extra_dead_times=delays)
        work += model_error_work(plant, estimator, gain_factors=len(by_input), extra_dead_times=(0,))
        if work > caps.max_model_error_work:
            problems.append(
                FieldProblem(
                    pointer(*_WHERE, "gain_factors"),
                    f"the model-error study of this loop would take about {work:.2e} floating-point operations; "
                    f"this service accepts at most {caps.max_model_error_work:.2e}. Give fewer factors or "
                    "shorter extra dead times",
                )
            )
    if problems:
        return None, problems
    return ModelErrorInputs(gain_factors=factors, extra_dead_times=delays, input_gain_factors=by_input), []


def compute_model_error(
    inputs: ModelErrorInputs, design: ControllerDesign, estimator: Estimator, plant: DiscretePlant, scaled: ScaledPlant
) -> ModelErrorStudy:
    """The study on the scaled model with the design and estimator of that model.

    The perturbed plant is that of what the estimator reads: the measured outputs with their
    feed-through (scaled by their spans; the controlled outputs unless the model has measured
    outputs of its own).

    Raises
    ------
    service.errors.NumericalError
        Pointer ``/analysis/model_error`` when a spectral radius is not a finite number.
    """
    loop = control_loop(design, estimator)
    measured, feedthrough = scaled_measured(plant) if plant.measured_own else (scaled.c, None)
    if feedthrough is not None and not np.any(feedthrough):
        feedthrough = None
    try:
        study = model_error_study(
            loop,
            scaled.a,
            scaled.b,
            measured,
            feedthrough=None if estimator.full_state else feedthrough,
            gain_factors=inputs.gain_factors,
            extra_dead_times=inputs.extra_dead_times,
            input_gain_factors=inputs.input_gain_factors,
        )
    except np.linalg.LinAlgError as exc:  # I + K L (f - 1) D_m singular
        raise NumericalError(
            "With a gain factor the true sensors' feed-through differs from the d_measured the estimator "
            "subtracts, and for one factor the command is not determined by the measurements (the loop through "
            "that difference cancels the command). Give other gain factors, or change d_measured",
            field=_WHERE,
        ) from exc
    radii = [case.spectral_radius for case in study.cases] + [case.spectral_radius for case in study.input_cases]
    if not all(math.isfinite(radius) for radius in radii):
        raise NumericalError(
            "The poles of a perturbed loop are not finite numbers: the model's numbers or the factors are too "
            "large for the loop's eigenvalues in double precision. Rescale the model or give smaller factors",
            field=_WHERE,
        )
    return study


def model_error_report(study: ModelErrorStudy, estimator: Estimator) -> ModelErrorReport:
    """Turn the study into the response block."""
    return ModelErrorReport(
        cases=[
            ModelErrorCaseReport(
                gain_factor=case.gain_factor,
                extra_dead_time=case.extra_dead_time,
                spectral_radius=case.spectral_radius,
                verdict=case.verdict,
                nominal_circle_poles=case.nominal_circle_poles,
                rest_spectral_radius=case.rest_spectral_radius,
                rest_verdict=case.rest_verdict,
            )
            for case in study.cases
        ],
        stable_ranges=[
            ModelErrorRangeReport(extra_dead_time=d, lowest_stable_factor=low, highest_stable_factor=high)
            for d, low, high in study.stable_ranges
        ],
        input_gain_cases=[
            ModelErrorInputCaseReport(
                input_gain_factors=list(case.input_gain_factors),
                spectral_radius=case.spectral_radius,
                verdict=case.verdict,
                nominal_circle_poles=case.nominal_circle_poles,
                rest_spectral_radius=case.rest_spectral_radius,
                rest_verdict=case.rest_verdict,
            )
            for case in study.input_cases
        ],
        tolerance=MARGINAL_TOLERANCE,
        estimator=estimator.kind,
    )
