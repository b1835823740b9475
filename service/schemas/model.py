"""Plant models as requests carry them: state space (discrete or continuous) or transfer matrix."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field

from service.schemas.common import FiniteFloat, Matrix, RequestModel
from service.schemas.signals import OperatingPoint, TagList
from service.schemas.step_response import StepResponseModel

__all__ = [
    "MODEL_KINDS",
    "PlantModel",
    "StateSpaceModel",
    "StepResponseModel",
    "TransferElementModel",
    "TransferMatrixModel",
]

Positive = Annotated[FiniteFloat, Field(gt=0)]


class _Tagged(RequestModel):
    """Tags shared by every model kind; each list is optional."""

    inputs: TagList | None = Field(default=None, description="One tag per manipulated variable.")
    outputs: TagList | None = Field(default=None, description="One tag per controlled output.")
    disturbances: TagList | None = Field(default=None, description="One tag per measured disturbance.")
    operating_point: OperatingPoint | None = Field(
        default=None,
        description="The steady values at which this linear model holds (engineering units). With it, "
        "limits, setpoints, initial input and setpoint, measured disturbance values, every series, CSV "
        "column and limit report are absolute; the solver works in deviations from it, and the gains "
        "act on deviations (du = Kr (r - z0) - Kx x - Ku (u(k-1) - u0)). Measured outputs of their own "
        "(c_measured) need their operating values in operating_point.measured for /simulate and "
        "/design/export. Without it, all those values are deviations from the model's origin.",
    )


class StateSpaceModel(_Tagged):
    """``x+ = A x + B u + Bd d`` (or ``dx/dt = ...``), controlled ``z = C x``, measured ``y = Cm x + Dm u``."""

    kind: Literal["state_space"] = Field(description="Model form: matrices A, B, C.")
    a: Matrix = Field(description="State matrix A, n x n, as a list of rows.")
    b: Matrix = Field(description="Input matrix B, n x m (one column per manipulated variable).")
    c: Matrix = Field(description="Controlled-output matrix C, p x n.")
    d: Matrix | None = Field(
        default=None,
        description="Feed-through of the controlled outputs, p x m. The formulation needs strictly "
        "proper controlled outputs, so it must be zero when given.",
    )
    b_disturbance: Matrix | None = Field(
        default=None, description="Measured-disturbance matrix Bd, n x md (feed-forward)."
    )
    c_measured: Matrix | None = Field(
        default=None,
        description="Measured-output matrix C_m, py x n: what the estimator reads (y_m = C_m x + D_m u); "
        "default: the controlled outputs.",
    )
    d_measured: Matrix | None = Field(
        default=None,
        description="Feed-through D_m of the measured outputs, py x m; default zero. The measurement at sample "
        "k sees the input applied at k, and the estimator subtracts D_m u(k). /design/export refuses it (the "
        "law would depend on its own output through the measurement).",
    )
    measured: TagList | None = Field(default=None, description="One tag per measured output.")
    time_domain: Literal["discrete", "continuous"] = Field(
        default="discrete",
        description="'discrete': the matrices are sampled already; 'continuous': they are sampled "
        "exactly under zero-order hold at sample_time.",
    )
    sample_time: Positive = Field(description="Sample time, in the time unit of the model.")


class TransferElementModel(RequestModel):
    """One input/output pair: K (L s + 1) / ((t1 s + 1)(t2 s + 1)) (1/s if integrating) e^(-theta s)."""

    gain: FiniteFloat = Field(
        description="Steady-state gain (output unit per input unit); for an integrating element the "
        "ramp rate (output unit per input unit per time unit)."
    )
    time_constants: Annotated[list[Positive], Field(max_length=2)] = Field(
        default_factory=list, description="Zero, one or two lag time constants, in the model's time unit."
    )
    dead_time: Annotated[FiniteFloat, Field(ge=0)] = Field(
        default=0.0,
        description="Dead time, in the model's time unit; need not be whole samples. At most 10 000 sample "
        "times, and its samples count as states within the state cap.",
    )
    lead: FiniteFloat | None = Field(
        default=None, description="Lead time constant L of (L s + 1); negative for an inverse response."
    )
    integrating: bool = Field(default=False, description="A ramp response (common for levels).")


ElementGrid = list[list[TransferElementModel | None]]


class TransferMatrixModel(_Tagged):
    """A transfer matrix from step tests: one row per controlled output, one element per input."""

    kind: Literal["transfer_matrix"] = Field(description="Model form: transfer-function elements.")
    elements: ElementGrid = Field(description="p rows of m elements; null where an input does not affect an output.")
    disturbance_elements: ElementGrid | None = Field(
        default=None, description="p rows of md elements for the measured disturbances."
    )
    time_domain: Literal["continuous"] = Field(
        default="continuous", description="Elements are continuous-time; sampled exactly under zero-order hold."
    )
    sample_time: Positive = Field(description="Sample time, in the time unit of the elements.")


PlantModel = Annotated[StateSpaceModel | TransferMatrixModel | StepResponseModel, Field(discriminator="kind")]

#: The values of ``kind``; pydantic puts the chosen one into error locations.
MODEL_KINDS = frozenset({"state_space", "transfer_matrix", "step_response"})
