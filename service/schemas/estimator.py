"""The estimator as requests carry it: shared by /design (robustness analysis) and /simulate.

Every value is in the engineering units of the model's tags; covariances are in those units
squared.
"""

from __future__ import annotations

from typing import Literal

from pydantic import Field

from service.schemas.common import Matrix, RequestModel, Vector

__all__ = ["Covariance", "EstimatorRequest"]

Covariance = Vector | Matrix


class EstimatorRequest(RequestModel):
    """How the controller estimates the state (and a constant disturbance) from the outputs."""

    kind: Literal["full_state", "per_output", "output_disturbance", "input_disturbance", "kalman"] = Field(
        default="per_output",
        description="'per_output' (default): one step disturbance per measured output (the controlled "
        "outputs unless model.c_measured is given), for offset-free "
        "control: a bias on the output for a self-regulating output, a bias on its rate for an "
        "integrating output (a level), chosen from the model's structure or per output by "
        "'disturbances'; 'full_state': the state is read as measured (analysis only); 'output_disturbance': "
        "a constant disturbance on each output (fails on integrating outputs); "
        "'input_disturbance': a constant disturbance entering with each input; 'kalman': a "
        "steady-state Kalman filter from the covariances below, with the disturbance model "
        "of 'disturbance'. Every kind but full_state is a steady-state Kalman filter.",
    )
    disturbance: Literal["per_output", "output", "input", "none"] | None = Field(
        default=None, description="Disturbance model of a 'kalman' estimator (default 'output'); only with kalman."
    )
    disturbances: list[Literal["output", "rate"]] | None = Field(
        default=None,
        description="The per-output disturbance model, one entry per measured output in model order (the "
        "controlled outputs unless model.c_measured is given): "
        "'output' (a step bias on the output, for self-regulating outputs) or 'rate' (a step bias on its "
        "rate, for integrating outputs such as a level with an unmeasured inflow). Default: 'rate' for "
        "each output that sees a mode of the model at z = 1, 'output' for the others. Only with kind "
        "'per_output', or 'kalman' with disturbance 'per_output'.",
    )
    process_noise: Covariance | None = Field(
        default=None,
        description="Covariance of the noise on each model state per sample: n variances or an n x n "
        "symmetric positive-semidefinite matrix (default 0.01 per state, in units of the state's natural "
        "size: how large it is when the outputs it reaches are of their size; so that no unit moves the "
        "default filter).",
    )
    disturbance_noise: Covariance | None = Field(
        default=None,
        description="Covariance of the per-sample change of each estimated disturbance (output units "
        "squared for output disturbances, input units squared for input ones). Default: 1 per "
        "disturbance in units of its signal's size: the span when the signal has one, else the natural "
        "size the model gives it (the outputs' and inputs' sizes fitted to the magnitudes of the step "
        "responses), so that no unit moves the default filter.",
    )
    measurement_noise: Covariance | None = Field(
        default=None,
        description="Covariance of the noise on each measured output: py variances or a py x py symmetric "
        "positive-definite matrix (default 1 per output in units of its size: its span when it has one, "
        "else its natural size, as for disturbance_noise).",
    )
