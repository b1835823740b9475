"""``analysis.model_error`` of POST /design: the loop on the model with scaled gains and longer dead times.

The controller and its estimator (the request's ``estimator``) are designed on the model; the
plant they run on is the model with every element's gain multiplied by one factor and every dead
time lengthened by a number of samples (``f z^-d P(z)``).  Computed by
:func:`service.solver.evaluation.model_error.model_error_study`; no scenario is needed.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field

from service.schemas.common import RequestModel, ResponseModel

__all__ = [
    "MAX_GAIN_FACTOR",
    "MIN_GAIN_FACTOR",
    "ModelErrorCaseReport",
    "ModelErrorInputCaseReport",
    "ModelErrorRangeReport",
    "ModelErrorReport",
    "ModelErrorRequest",
]

#: Bounds of one gain factor.
MIN_GAIN_FACTOR = 1e-6
MAX_GAIN_FACTOR = 1e6
#: Longest list the schema parses (the service's cap on the cases is lower; see the caps).
_LONGEST_LIST = 1000

GainFactor = Annotated[float, Field(strict=True, allow_inf_nan=False, ge=MIN_GAIN_FACTOR, le=MAX_GAIN_FACTOR)]
ExtraDeadTime = Annotated[int, Field(strict=True, ge=0)]


class ModelErrorRequest(RequestModel):
    """Which model errors to try: every gain factor with every extra dead time."""

    gain_factors: list[GainFactor] = Field(
        default_factory=lambda: [0.5, 0.67, 0.8, 1.0, 1.25, 1.5, 2.0],
        min_length=1,
        max_length=_LONGEST_LIST,
        description=f"Factors multiplying every element's gain of the plant ({MIN_GAIN_FACTOR:g} to "
        f"{MAX_GAIN_FACTOR:g}; 1 is the model itself). The number of factors times the number of extra "
        "dead times is capped by the service.",
    )
    extra_dead_time: list[ExtraDeadTime] = Field(
        default_factory=lambda: [0],
        min_length=1,
        max_length=_LONGEST_LIST,
        description="Samples added to every dead time of the plant (0: none). Each sample adds one state per "
        "input or per output, whichever are fewer, within the service's state cap. Needs an estimator other "
        "than full_state for values above 0 (full_state reads the model's own states).",
    )
    input_gain_factors: list[list[GainFactor]] = Field(
        default_factory=list,
        max_length=_LONGEST_LIST,
        description="Each entry one factor per manipulated variable, multiplying the gains of every element of "
        "that input's column (the plant G diag(f): each input's gain in error on its own, e.g. [1.2, 0.8]), "
        "without extra dead time. Reported in input_gain_cases; they count towards the service's cap on the "
        "cases. Empty: none.",
    )


class ModelErrorCaseReport(ResponseModel):
    """The loop on one perturbed plant."""

    gain_factor: float
    extra_dead_time: int = Field(description="Samples.")
    spectral_radius: float = Field(
        description="Largest modulus of the poles of plant, controller and estimator together, the plant perturbed."
    )
    verdict: Literal["stable", "marginal", "unstable"] = Field(
        description="stable: radius below 1 - tolerance; unstable: above 1 + tolerance; marginal: in between."
    )
    nominal_circle_poles: int = Field(
        description="Poles of this loop set aside because they stay (within the tolerance) at poles that the "
        "model's own loop has on the unit circle by construction: a zone output's integrator, a direction of "
        "the inputs that moves no weighted output (closed_loop and the design's warnings say which). 0 when "
        "that loop has none."
    )
    rest_spectral_radius: float = Field(description="Largest modulus of the other poles (0 when none is left).")
    rest_verdict: Literal["stable", "marginal", "unstable"] = Field(
        description="The verdict on the other poles, with the same tolerance: whether the model error moves a "
        "pole beyond those the design leaves on the circle. Equal to verdict when nominal_circle_poles is 0."
    )


class ModelErrorInputCaseReport(ResponseModel):
    """The loop on the model with each input's gains multiplied by a factor of its own."""

    input_gain_factors: list[float] = Field(description="One per manipulated variable, as asked.")
    spectral_radius: float = Field(description="As in cases.")
    verdict: Literal["stable", "marginal", "unstable"] = Field(description="As in cases.")
    nominal_circle_poles: int = Field(description="As in cases.")
    rest_spectral_radius: float = Field(description="As in cases.")
    rest_verdict: Literal["stable", "marginal", "unstable"] = Field(description="As in cases.")


class ModelErrorRangeReport(ResponseModel):
    """The range of gain factors found stable at one extra dead time."""

    extra_dead_time: int
    lowest_stable_factor: float | None = Field(
        description="Smallest factor of the run of consecutive factors (sorted) whose rest_verdict is stable that "
        "holds the factor nearest 1; null when that factor's is not. Only the factors asked are tried: the true "
        "limit lies between this factor and the next one asked."
    )
    highest_stable_factor: float | None = Field(description="Largest factor of that run; null as above.")


class ModelErrorReport(ResponseModel):
    """How much uniform gain error and extra dead time, and which gain errors per input, the tuning tolerates (design aid)."""

    cases: list[ModelErrorCaseReport] = Field(description="Every factor for every extra dead time, as asked.")
    stable_ranges: list[ModelErrorRangeReport] = Field(description="One per extra dead time, as asked.")
    input_gain_cases: list[ModelErrorInputCaseReport] = Field(
        default_factory=list, description="One per entry of input_gain_factors, as asked (empty when none)."
    )
    tolerance: float = Field(description="The tolerance of the verdicts around the unit circle.")
    estimator: str = Field(description="The estimator kind in the loop (the request's estimator.kind).")
