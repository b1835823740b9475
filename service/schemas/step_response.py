"""The step-response model kind: sampled step-response coefficients per output/input pair."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field

from service.schemas.common import FiniteFloat, RequestModel, ResponseModel
from service.schemas.signals import TagList

__all__ = ["ReductionReport", "StepReductionModel", "StepResponseModel", "StepResponsePairModel"]


class StepResponsePairModel(RequestModel):
    """One output/input pair of a step-response table."""

    coefficients: Annotated[list[FiniteFloat], Field(min_length=1)] = Field(
        description="The output's change 1, 2, ..., N samples after a unit step of the input, in output "
        "units per input unit (nothing changes within the sample of the step)."
    )
    integrating: bool = Field(
        default=False,
        description="After the table the response keeps rising at its last slope (coefficient N minus "
        "coefficient N-1) instead of staying at coefficient N.",
    )


StepGrid = list[list[StepResponsePairModel | None]]


class StepReductionModel(RequestModel):
    """Balanced truncation of the model's stable part (integrators are kept whole)."""

    states: Annotated[int, Field(ge=1)] | None = Field(
        default=None, description="At most this many states in the reduced model in all."
    )
    tolerance: Annotated[FiniteFloat, Field(gt=0)] | None = Field(
        default=None,
        description="Keep the fewest states whose error bound (twice the sum of the dropped Hankel singular "
        "values, a bound on the largest frequency-response error) is at most this, in output units per "
        "input unit.",
    )


class StepResponseModel(RequestModel):
    """A step-response table from step tests, realized exactly as a state-space model."""

    kind: Literal["step_response"] = Field(description="Model form: sampled step-response coefficients.")
    inputs: TagList | None = Field(default=None, description="One tag per manipulated variable.")
    outputs: TagList | None = Field(default=None, description="One tag per controlled output.")
    disturbances: TagList | None = Field(default=None, description="One tag per measured disturbance.")
    responses: StepGrid = Field(
        description="p rows of m pairs (one row per controlled output, one pair per input); null where an "
        "input does not affect an output."
    )
    disturbance_responses: StepGrid | None = Field(
        default=None, description="p rows of md pairs for the measured disturbances."
    )
    sample_time: Annotated[FiniteFloat, Field(gt=0)] = Field(
        description="Sample time of the coefficients, in the model's time unit."
    )
    reduction: StepReductionModel | None = Field(
        default=None,
        description="Reduce the exact realization (one state per coefficient of the longest pair of each "
        "input, plus one integrator per integrating output) by balanced truncation of its stable part.",
    )


class ReductionReport(ResponseModel):
    """What the balanced truncation of a step-response model kept."""

    states_before: int = Field(description="States of the exact realization.")
    states_after: int = Field(description="States of the reduced model.")
    integrators_kept: int = Field(description="States on the unit circle (integrators), kept whole.")
    hankel_singular_values: list[float] = Field(description="Of the stable part, largest first.")
    error_bound: float = Field(
        description="Twice the sum of the dropped Hankel singular values: no frequency response of the "
        "reduced model differs from the exact one by more (steady-state gains included), in output units "
        "per input unit (Enns 1984; Al-Saggaf and Franklin 1987 for sampled models)."
    )
