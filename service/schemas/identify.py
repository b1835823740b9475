"""POST /identify: plant-test data in, a fitted model that /design takes unchanged out."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field

from service.schemas.common import FiniteFloat, RequestModel, ResponseModel
from service.schemas.design import ADVISORY, WarningReport
from service.schemas.model import StateSpaceModel, TransferMatrixModel
from service.schemas.signals import TagName

__all__ = [
    "CorrelationReport",
    "DataReport",
    "IdentifyRequest",
    "IdentifyResponse",
    "OutputFitReport",
    "PairFitReport",
    "PairStructure",
    "ParameterReport",
    "StepSeriesReport",
    "SubspaceReport",
    "TagDataReport",
]

Positive = Annotated[FiniteFloat, Field(gt=0)]

PairStructureName = Literal[
    "first_order_dead_time",
    "second_order_dead_time",
    "integrating_dead_time",
    "integrating_first_order_dead_time",
    "none",
]


class PairStructure(RequestModel):
    """The structure of one output/input pair, instead of the request's default."""

    output: TagName
    input: TagName = Field(description="A manipulated input or a measured disturbance.")
    structure: PairStructureName = Field(description="'none': the input does not act on this output (not fitted).")


class ValidationRequest(RequestModel):
    """Hold out the end of the record: fit on the rest, report the fit on it."""

    fraction: Annotated[FiniteFloat, Field(gt=0, le=0.5)] = Field(
        description="Share of the record, at its end, left out of the fit."
    )


class IdentifyRequest(RequestModel):
    """Plant-test data as columns keyed by tag, and the model structure to fit."""

    sample_time: Positive = Field(
        description="Sample time of the data and of the fitted model, in the time unit of the answer."
    )
    inputs: Annotated[list[TagName], Field(min_length=1)] = Field(description="Tags of the manipulated inputs.")
    outputs: Annotated[list[TagName], Field(min_length=1)] = Field(description="Tags of the controlled outputs.")
    disturbances: list[TagName] = Field(default_factory=list, description="Tags of measured disturbances.")
    data: dict[TagName, list[FiniteFloat | None]] = Field(
        description="One column per tag, all of the same length, one value per sample (null where missing). "
        "Missing inputs hold their last value (reported); missing outputs are left out of the fit (reported)."
    )
    time: list[FiniteFloat] | None = Field(
        default=None,
        description="Time of each sample, increasing, in the time unit; default: one sample_time apart.",
    )
    structure: Literal["first_order_dead_time", "second_order_dead_time", "subspace"] = Field(
        default="first_order_dead_time",
        description="Structure of every pair: K e^(-theta s)/(tau s + 1), or with two lags. Pairs of an "
        "integrating output use the integrating variant of the same order (K e^(-theta s)/s, or "
        "K e^(-theta s)/(s (tau s + 1))). 'subspace': one discrete state-space model of all inputs and "
        "outputs by PO-MOESP (Verhaegen 1994), its order read from the singular values.",
    )
    order: Annotated[int, Field(ge=1, le=100)] | None = Field(
        default=None, description="Subspace fit: the model order; default read from the singular values."
    )
    block_rows: Annotated[int, Field(ge=2, le=200)] | None = Field(
        default=None, description="Subspace fit: block rows of the Hankel matrices; default up to 20."
    )
    integrating: list[TagName] = Field(default_factory=list, description="Outputs that integrate (levels).")
    pairs: list[PairStructure] = Field(default_factory=list, description="Structures of single pairs.")
    detrend: bool = Field(default=False, description="Fit a linear drift per output as well (reported).")
    max_dead_time: Positive | None = Field(
        default=None,
        description="Longest dead time considered, in the time unit, shorter than the record to fit; default a "
        "third of the record.",
    )
    settling_time: Positive | None = Field(
        default=None,
        description="Rough settling time of the slowest pair, in the time unit (behind the starting values); "
        "default a quarter of the record.",
    )
    outlier_limit: Annotated[FiniteFloat, Field(ge=3)] | None = Field(
        default=6.0,
        description="An output sample farther than this many robust standard deviations from its running "
        "median, and from the fitted model's output (the model fitted without it), is an outlier: left out of "
        "the fit and reported (the subspace fit judges on the running median only); so is a frozen stretch (data.tags "
        "frozen). null: neither check.",
    )
    validation: ValidationRequest | None = Field(default=None, description="Report the fit on a held-out segment.")
    correlation_lags: Annotated[int, Field(ge=1, le=200)] = Field(
        default=20,
        description="Lags of the residual checks; fewer than the samples to fit. Left out: 20, or a quarter of "
        "the samples to fit when there are not more than 20.",
    )


class ParameterReport(ResponseModel):
    """One fitted parameter."""

    name: str = Field(description="gain, time_constant, time_constant_1, time_constant_2 or dead_time.")
    estimate: float
    standard_error: float | None = Field(description="From the Jacobian at the solution; null when undetermined.")
    at_bound: bool = Field(description="The estimate ended at a bound of its range.")


class PairFitReport(ResponseModel):
    """The fitted pair and its parameters."""

    output: str
    input: str
    structure: str
    parameters: list[ParameterReport]


class CorrelationReport(ResponseModel):
    """A normalized correlation sequence with its 99 % bound for white residuals."""

    lags: list[int]
    values: list[float]
    bound: float
    outside: int = Field(description="Lags outside the bound.")


class CrossCorrelationReport(CorrelationReport):
    """Cross-correlation of the residuals with one input (residual lagging the input)."""

    input: str


class SegmentFitReport(ResponseModel):
    """Fit measures over one segment."""

    samples: int
    nrmse_fit_percent: float | None = Field(description="100 (1 - |y - y_hat| / |y - mean(y)|).")
    r_squared: float | None


class OutputFitReport(ResponseModel):
    """How well the model fits one output."""

    output: str
    estimation: SegmentFitReport
    validation: SegmentFitReport | None = Field(default=None, description="On the held-out segment, when asked.")
    residual_std: float = Field(description="Standard deviation of the residuals, output units.")
    offset: ParameterReport = Field(
        description="The output's operating point (its value at the inputs' operating point)."
    )
    drift: ParameterReport | None = Field(default=None, description="Linear drift, output units per time unit.")
    autocorrelation: CorrelationReport
    cross_correlation: list[CrossCorrelationReport]


class StepSeriesReport(ResponseModel):
    """The fitted unit-step response of one pair, for plotting."""

    output: str
    input: str
    time: list[float]
    value: list[float] = Field(description="Output change per unit input step, at the sample instants.")


class TagDataReport(ResponseModel):
    """What was found in one column."""

    tag: str
    missing: int
    outliers: int
    first_missing: list[int] = Field(description="Sample indices of the first missing values (at most 20).")
    first_outliers: list[int] = Field(description="Sample indices of the first outliers (at most 20).")
    frozen: int = Field(
        default=0,
        description="Samples of an output that read one value 10 or more samples in a row where the fitted "
        "model moves (a stuck sensor, or a gap the historian filled with its last value).",
    )
    first_frozen: list[int] = Field(default_factory=list, description="Sample indices of the first (at most 20).")
    handling: str = Field(description="What was done with them.")


class DataReport(ResponseModel):
    """The data as used."""

    samples: int
    sample_time: float
    resampling: str | None = Field(default=None, description="How irregular or faster data was put on the sample time.")
    estimation_samples: int
    validation_samples: int
    tags: list[TagDataReport]


class SubspaceReport(ResponseModel):
    """How the subspace fit chose its order."""

    method: str
    order: int
    block_rows: int
    singular_values: list[float] = Field(description="Largest first; the order is where they drop.")


class IdentifyResponse(ResponseModel):
    """The fitted model and everything needed to judge it."""

    model: Annotated[TransferMatrixModel | StateSpaceModel, Field(discriminator="kind")] = Field(
        description="Post it unchanged as a /design model: a transfer matrix, or a discrete state-space model "
        "from the subspace fit. Its operating_point holds the inputs' (and measured disturbances') values at "
        "the start of the test and the outputs' fitted offsets: the model holds for deviations from them, and "
        "a /design or /simulate request with it reads and answers absolute engineering units."
    )
    subspace: SubspaceReport | None = Field(default=None, description="For structure 'subspace'.")
    pairs: list[PairFitReport]
    fits: list[OutputFitReport]
    step_responses: list[StepSeriesReport]
    data: DataReport
    warnings: list[WarningReport]
    advisory: str = Field(default=ADVISORY)
