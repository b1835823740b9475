"""POST /identify/csv: the choices of an identification as query parameters beside a CSV body."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import BeforeValidator, ConfigDict, Field

from service.schemas.common import RequestModel

__all__ = ["IdentifyCsvOptions"]


def _none_word(value: object) -> object:
    """A query parameter of 'none' (any case) for a JSON null: a query string has no null."""
    return None if isinstance(value, str) and value.strip().lower() == "none" else value


#: Query parameters arrive as text: numbers here are parsed from it (still finite only).
QueryFloat = Annotated[float, Field(allow_inf_nan=False)]
Positive = Annotated[QueryFloat, Field(gt=0)]
TagText = Annotated[str, Field(max_length=4000)]


class IdentifyCsvOptions(RequestModel):
    """The request's choices; tag lists are comma-separated."""

    # Query parameters arrive as text, so numbers and booleans are parsed from it here (the
    # JSON bodies stay strict); unknown parameters are still refused.
    model_config = ConfigDict(extra="forbid", frozen=True, strict=False)

    sample_time: Positive = Field(description="Sample time of the fitted model, in the time unit.")
    inputs: TagText = Field(description="Manipulated inputs: column names, comma-separated.")
    outputs: TagText = Field(description="Controlled outputs: column names, comma-separated.")
    disturbances: TagText = Field(default="", description="Measured disturbances, comma-separated.")
    integrating: TagText = Field(default="", description="Outputs that integrate, comma-separated.")
    pairs: TagText = Field(
        default="",
        description="Structures of single pairs as output:input:structure, comma-separated (e.g. 'LI301:FIC101:none').",
    )
    time_column: Annotated[str, Field(max_length=64)] | None = Field(
        default=None,
        description="Column of the time stamps (numbers in the time unit, or ISO 8601 date-times); default "
        "the first column when it is not a listed tag. Without one, samples are sample_time apart.",
    )
    time_unit: Literal["s", "min", "h"] = Field(
        default="s", description="Time unit of ISO 8601 time stamps once converted (match the sample time)."
    )
    structure: Literal["first_order_dead_time", "second_order_dead_time", "subspace"] = Field(
        default="first_order_dead_time", description="As the JSON body's structure."
    )
    order: Annotated[int, Field(ge=1, le=100)] | None = Field(
        default=None, description="Subspace fit: the model order; default read from the singular values."
    )
    block_rows: Annotated[int, Field(ge=2, le=200)] | None = Field(
        default=None, description="Subspace fit: block rows of the Hankel matrices; default up to 20."
    )
    detrend: bool = False
    max_dead_time: Positive | None = None
    settling_time: Positive | None = None
    outlier_limit: Annotated[Annotated[QueryFloat, Field(ge=3)] | None, BeforeValidator(_none_word)] = Field(
        default=6.0, description="As the JSON body's outlier_limit; 'none' switches the check off."
    )
    validation_fraction: Annotated[QueryFloat, Field(gt=0, le=0.5)] | None = Field(
        default=None, description="Share of the record, at its end, held out of the fit."
    )
    correlation_lags: Annotated[int, Field(ge=1, le=200)] = 20
