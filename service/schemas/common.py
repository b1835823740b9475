"""Building blocks shared by every request and response model.

Numbers are strict finite floats (integers accepted, booleans and strings refused, NaN and
infinity refused); matrices travel as lists of rows.  Every request model forbids unknown
fields, so a misspelt field is an error, never a silent default.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field

__all__ = [
    "Caps",
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


@dataclass(frozen=True)
class Caps:
    """Size caps a request must respect, so that no request can exhaust memory or time.

    Built by the API from its settings; the defaults are the service's defaults.
    """

    max_states: int = 500
    max_signals: int = 100
    max_prediction_horizon: int = 2000
    max_hessian_size: int = 4000
    #: Entries of the stacked prediction matrices ``[Fx Fu G]`` (8 bytes each).
    max_prediction_entries: int = 25_000_000
    #: Entries of the horizon gain ``Kh`` returned in a response.
    max_response_entries: int = 2_000_000
    #: Values in one tuning sweep.
    max_sweep_values: int = 50
    #: Longest simulated run of POST /simulate, in steps.
    max_simulation_steps: int = 100_000
    #: Estimated work of one simulated run: steps times the floating-point operations of a
    #: step (its matrix-vector products) plus a fixed 30 000 per step for the interpreter's
    #: own cost (``service.pipeline.simulate_checks.simulation_work``).  The default is
    #: about 5 s of one core at 1 GFLOP/s, a rough rate for matrix-vector products this small.
    max_simulation_work: int = 5_000_000_000
    #: Estimated work of one frequency analysis (``analysis.frequency`` of /design): grid
    #: points times the floating-point operations of evaluating the loop there
    #: (``service.pipeline.robustness.frequency_work``); the same rough 5 s.
    max_frequency_work: int = 5_000_000_000
