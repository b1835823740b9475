"""Building blocks shared by every request and response model.

Numbers are strict finite floats (integers accepted, booleans and strings refused, NaN and
infinity refused); matrices travel as lists of rows.  Every request model forbids unknown
fields, so a misspelt field is an error, never a silent default.
"""

from __future__ import annotations

from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field

__all__ = [
    "FiniteFloat",
    "Matrix",
    "RequestModel",
    "ResponseModel",
    "Vector",
]

FiniteFloat = Annotated[float, Field(strict=True, allow_inf_nan=False)]
"""A finite real number; JSON integers are accepted, booleans and strings are not."""

Vector = list[FiniteFloat]
Matrix = list[list[FiniteFloat]]


class RequestModel(BaseModel):
    """Base of request models: unknown fields are rejected."""

    model_config = ConfigDict(extra="forbid", frozen=True)


class ResponseModel(BaseModel):
    """Base of response models."""

    model_config = ConfigDict(extra="forbid")
