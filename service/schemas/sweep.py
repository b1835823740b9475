"""POST /design/sweep: one tuning parameter varied over a list of values.

The base design request carries the analysis and the estimator: with
``design.analysis.frequency`` each entry gets its peak sensitivity, and with a ``scenario``
its figures of merit, each exactly as a separate /design or /simulate call with that value.
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field, ValidationInfo, field_validator
from pydantic_core import PydanticCustomError

from service.schemas.common import FiniteFloat, OmittedErrors, RequestModel, ResponseModel
from service.schemas.design import ADVISORY, DesignRequest, WarningReport
from service.schemas.simulate import PerformanceReport, ScenarioRequest

__all__ = ["SweepEntryReport", "SweepParameter", "SweepProblem", "SweepRequest", "SweepResponse"]

SweepParameter = Literal["move_weight", "output_weight", "input_weight", "prediction", "control", "first_penalized"]
HORIZON_PARAMETERS = frozenset({"prediction", "control", "first_penalized"})


class SweepRequest(RequestModel):
    """A base design and one parameter to vary over ``values``."""

    design: DesignRequest = Field(description="The base design request; every entry changes only the swept parameter.")
    parameter: SweepParameter = Field(
        description="'move_weight', 'output_weight' or 'input_weight' (weights.move, weights.output, "
        "weights.input; of one signal, or of all), or a horizon: 'prediction', 'control' or 'first_penalized'. "
        "A base request without weights.input has an input weight of zero on every input (none): "
        "'input_weight' of one signal then sets that input's weight to the value and every other "
        "input's to 0, and of every input a diagonal of the value. A value of 0 switches that input's "
        "target off (of every input: all of them, as in /design); with weights.terminal 'riccati' an entry "
        "that leaves spare inputs without an input weight fails as /design refuses it (at "
        "/design/weights/terminal)."
    )
    signal: Annotated[int, Field(strict=True, ge=0)] | None = Field(
        default=None,
        description="For a weight: the 0-based index of the signal (output for 'output_weight', "
        "manipulated variable otherwise) whose diagonal weight is swept; a full-matrix weight keeps "
        "its other entries. null sets every signal's weight to the value (a diagonal). Not allowed "
        "when sweeping a horizon.",
    )
    values: Annotated[list[FiniteFloat], Field(min_length=1)] = Field(
        description="The values to try, in order: weights >= 0, horizons whole numbers >= 1 (a 422 at "
        "/values names the first value that does not fit the parameter)."
    )
    scenario: ScenarioRequest | None = Field(
        default=None,
        description="With a scenario, each entry is also simulated as POST /simulate would with that value "
        "(the base design's estimator closes the loop); the runs together stay within the service's "
        "simulation work cap.",
    )

    @field_validator("signal")
    @classmethod
    def _signal_fits_the_parameter(cls, signal: int | None, info: ValidationInfo) -> int | None:
        """A signal index applies to a weight sweep only (named at ``/signal``)."""
        if signal is not None and info.data.get("parameter") in HORIZON_PARAMETERS:
            raise PydanticCustomError(
                "sweep_signal", "'signal' applies to weights only; leave it out when sweeping a horizon"
            )
        return signal

    @field_validator("values")
    @classmethod
    def _values_fit_the_parameter(cls, values: list[float], info: ValidationInfo) -> list[float]:
        """Horizon values are whole numbers >= 1, weight values >= 0 (named at ``/values``).

        Skipped when ``parameter`` itself is invalid (its own error names it).
        """
        parameter = info.data.get("parameter")
        if parameter is None:
            return values
        if parameter in HORIZON_PARAMETERS:
            bad = [(i, v) for i, v in enumerate(values) if v != int(v) or v < 1]
            if bad:
                i, v = bad[0]
                raise PydanticCustomError(
                    "sweep_values",
                    "horizon values must be whole numbers >= 1; value {index} is {value}",
                    {"index": i, "value": f"{v:g}"},
                )
        else:
            bad = [(i, v) for i, v in enumerate(values) if v < 0]
            if bad:
                i, v = bad[0]
                raise PydanticCustomError(
                    "sweep_values",
                    "weight values must not be negative; value {index} is {value}",
                    {"index": i, "value": f"{v:g}"},
                )
        return values


class SweepProblem(ResponseModel):
    """Why one entry could not be designed: problem details for that value alone."""

    type: str
    detail: str
    errors: list[dict[str, str]]
    omitted_errors: OmittedErrors = None


class SweepEntryReport(ResponseModel):
    """What the design gives at one value: the same numbers a separate /design call gives."""

    value: float
    status: Literal["designed", "failed"]
    fingerprint: str = Field(description="Fingerprint of the design request with this value substituted.")
    spectral_radius: float | None = None
    stable: bool | None = None
    condition_number: float | None = None
    warnings: list[WarningReport] = Field(default_factory=list)
    peak_sensitivity: float | None = Field(
        default=None,
        description="With design.analysis.frequency: the larger of the robustness block's peak sensitivities "
        "at the plant input and output.",
    )
    performance: PerformanceReport | None = Field(
        default=None, description="With a scenario: the figures of merit /simulate answers for this value."
    )
    problem: SweepProblem | None = None


class SweepResponse(ResponseModel):
    """One entry per value, in the order given."""

    parameter: SweepParameter
    signal: int | None
    entries: list[SweepEntryReport]
    advisory: str = ADVISORY
