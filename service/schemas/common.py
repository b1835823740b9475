"""Building blocks shared by every request and response model.

Numbers are strict finite floats (integers accepted, booleans and strings refused, NaN and
infinity refused); matrices travel as lists of rows.  Every request model forbids unknown
fields, so a misspelt field is an error, never a silent default, and validates strictly:
a boolean is ``true`` or ``false`` (never ``0``, ``1`` or ``"yes"``), an integer is a JSON
integer (never ``"10"``).  Vectors and matrices stop at their first bad entry (``fail_fast``),
so a list of a hundred thousand bad entries costs one error, not a hundred thousand.
"""

from __future__ import annotations

from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field

__all__ = [
    "FiniteFloat",
    "Matrix",
    "MatrixOut",
    "OmittedErrors",
    "RequestModel",
    "ResponseModel",
    "Vector",
]

FiniteFloat = Annotated[float, Field(strict=True, allow_inf_nan=False)]
"""A finite real number; JSON integers are accepted, booleans and strings are not."""

OmittedErrors = Annotated[
    int | None,
    Field(
        ge=1,
        exclude_if=lambda value: value is None,
        description="How many more fields were wrong than `errors` lists (it lists at most 50); "
        "sent only when some were left out.",
    ),
]
"""A problem's count of the field errors left out of its list (absent when none were)."""

Vector = Annotated[list[FiniteFloat], Field(min_length=1, fail_fast=True)]
"""A non-empty list of numbers of a request (the schema says ``minItems: 1``)."""
Matrix = Annotated[
    list[Annotated[list[FiniteFloat], Field(min_length=1, fail_fast=True)]], Field(min_length=1, fail_fast=True)
]
"""A non-empty list of non-empty rows of a request."""
MatrixOut = list[list[float]]
"""A matrix of a response (may be empty, e.g. no measured disturbances)."""


class RequestModel(BaseModel):
    """Base of request models: unknown fields are rejected, types are strict."""

    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)


class ResponseModel(BaseModel):
    """Base of response models."""

    model_config = ConfigDict(extra="forbid")
