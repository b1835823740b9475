"""The robustness analysis of a /design request: its checks, its work estimate and its report.

:func:`frequency_problems` refuses what the analysis cannot do or what would cost too much
(before anything is computed), :func:`frequency_work` estimates that cost, and
:func:`robustness_report` turns a :class:`service.solver.evaluation.frequency.FrequencyAnalysis` into
the response block (:mod:`service.schemas.robustness`).
"""

from __future__ import annotations

import math

import numpy as np

from service.errors import FieldProblem, NumericalError
from service.pipeline.caps import REFINEMENT_EVALUATIONS, Caps, loop_frequency_work
from service.pipeline.estimator import EstimatorInputs
from service.pipeline.plant import DiscretePlant
from service.pipeline.problems import pointer
from service.schemas.robustness import (
    LoopRobustnessReport,
    MarginsReport,
    RobustnessEstimatorReport,
    RobustnessReport,
    SingularValueReport,
)
from service.solver.estimation.estimator import Estimator
from service.solver.evaluation.frequency import ANALYSIS_FIELD, FrequencyAnalysis, LoopSensitivity

__all__ = ["frequency_problems", "robustness_report"]


def frequency_problems(
    plant: DiscretePlant, estimator: EstimatorInputs, *, points: int, caps: Caps
) -> list[FieldProblem]:
    """What stops the analysis of this request: too much work.

    Parameters
    ----------
    plant : DiscretePlant
    estimator : EstimatorInputs
        As checked (its disturbance model sets the controller's state count).
    points : int
    caps : Caps

    Returns
    -------
    list of FieldProblem
    """
    problems: list[FieldProblem] = []
    work = loop_frequency_work(plant, estimator, points=points)
    if work > caps.max_frequency_work:
        per_point = work / (points + REFINEMENT_EVALUATIONS)
        most = math.floor(caps.max_frequency_work / per_point) - REFINEMENT_EVALUATIONS
        advice = f"Ask for at most {most:,} points" if most >= 10 else "This loop is too large to analyse here"
        problems.append(
            FieldProblem(
                pointer("analysis", "points"),
                f"the frequency analysis of this loop at {points:,} points would take about {work:.2e} "
                f"floating-point operations; this service accepts at most {caps.max_frequency_work:.2e}. {advice}",
            )
        )
    return problems


def _finite(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None


def not_finite_analysis() -> NumericalError:
    """The problem of a frequency analysis whose numbers are not all finite (JSON has neither)."""
    return NumericalError(
        "The frequency analysis produced numbers that are not finite: a pole of the loop lies on or next to "
        "the unit circle at a frequency of the grid. Change the number of points, or move that pole off "
        "the unit circle",
        field=ANALYSIS_FIELD,
    )


def _values(values: np.ndarray) -> list[float]:
    if not np.all(np.isfinite(values)):
        raise not_finite_analysis()
    return [float(v) for v in values]


def _loop(loop: LoopSensitivity) -> LoopRobustnessReport:
    margins = None
    if loop.margins is not None:
        g = loop.margins
        margins = MarginsReport(
            gain_margin=_finite(g.gain_margin),
            gain_margin_db=_finite(g.gain_margin_db),
            phase_crossover_frequency=g.phase_crossover_frequency,
            phase_margin=_finite(g.phase_margin),
            gain_crossover_frequency=g.gain_crossover_frequency,
        )
    s, t = loop.sensitivity_singular_values, loop.complementary_singular_values
    peaks = _values(
        np.array(
            [
                loop.peak_sensitivity,
                loop.peak_sensitivity_frequency,
                loop.peak_complementary,
                loop.peak_complementary_frequency,
            ]
        )
    )
    return LoopRobustnessReport(
        peak_sensitivity=peaks[0],
        peak_sensitivity_db=loop.peak_sensitivity_db,
        peak_sensitivity_frequency=peaks[1],
        peak_complementary=peaks[2],
        peak_complementary_frequency=peaks[3],
        bandwidth=None if loop.bandwidth is None else _finite(loop.bandwidth),
        margins=margins,
        sensitivity=SingularValueReport(largest=_values(s[:, 0]), smallest=_values(s[:, -1])),
        complementary=SingularValueReport(largest=_values(t[:, 0]), smallest=_values(t[:, -1])),
    )


def robustness_report(analysis: FrequencyAnalysis, estimator: Estimator, plant: DiscretePlant) -> RobustnessReport:
    """Turn the solver's frequency analysis into the response block.

    ``plant`` gives the tags of the output-side break point: the measured outputs' (the
    controlled outputs' unless the model has measured outputs of its own), or the state
    labels for ``full_state``.

    Raises
    ------
    service.errors.NumericalError
        Pointer ``/analysis`` when a singular value or peak is not a finite number (JSON has
        neither NaN nor infinity); an infinite margin is reported as null instead.
    """
    poles = analysis.closed_loop_poles
    return RobustnessReport(
        frequencies=_values(analysis.frequencies),
        nyquist_frequency=analysis.nyquist_frequency,
        plant_input=_loop(analysis.plant_input),
        plant_output=_loop(analysis.plant_output),
        plant_output_signals=list(plant.state_labels) if estimator.full_state else [s.name for s in plant.measured],
        estimator=RobustnessEstimatorReport(
            kind=estimator.kind,
            disturbance=estimator.disturbance,
            disturbances=list(estimator.disturbances) or None,
            spectral_radius=estimator.spectral_radius,
        ),
        spectral_radius=float(np.abs(poles).max(initial=0.0)),
        stable=analysis.stable,
    )
