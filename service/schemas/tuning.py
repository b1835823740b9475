"""Tuning as requests carry it: horizons and weights."""

from __future__ import annotations

from typing import Annotated

from pydantic import Field

from service.schemas.common import Matrix, RequestModel, Vector

__all__ = ["Horizons", "Weights"]

Horizon = Annotated[int, Field(strict=True, ge=1)]


class Horizons(RequestModel):
    """Prediction horizon Hp, control horizon Hu and first penalized step Hw, in samples."""

    prediction: Horizon = Field(description="Prediction horizon Hp (samples), 1 <= Hp.")
    control: Horizon = Field(description="Control horizon Hu (moves), 1 <= Hu <= Hp.")
    first_penalized: Horizon = Field(
        default=1, description="First penalized prediction step Hw, 1 <= Hw <= Hp (default 1)."
    )


class Weights(RequestModel):
    """Output (controlled-variable) weights Q and move-suppression weights R."""

    output: Vector | Matrix = Field(
        description="Q: one non-negative number per controlled output, or a full symmetric "
        "positive-semidefinite p x p matrix."
    )
    move: Vector | Matrix = Field(
        description="R (move suppression): one non-negative number per manipulated variable, or a "
        "full symmetric positive-semidefinite m x m matrix."
    )
