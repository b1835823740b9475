"""POST /design: the request and response models."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field

from service.schemas.common import FiniteFloat, MatrixOut, RequestModel, ResponseModel
from service.schemas.estimator import EstimatorRequest
from service.schemas.limits import LimitCheckReport, LimitsRequest, OutputZone, ZoneReport
from service.schemas.model import PlantModel
from service.schemas.model_error import ModelErrorReport, ModelErrorRequest
from service.schemas.robustness import RobustnessReport
from service.schemas.step_response import ReductionReport
from service.schemas.tuning import Horizons, Weights

__all__ = [
    "ADVISORY",
    "MAX_FREQUENCY_POINTS",
    "MIN_FREQUENCY_POINTS",
    "ClosedLoopReport",
    "DesignAnalysis",
    "DesignRequest",
    "DesignResponse",
    "GainLabels",
    "GainReport",
    "HessianReport",
    "LabelledMatrix",
    "PlantReport",
    "PoleReport",
    "SampledModelReport",
    "SignalReport",
    "WarningReport",
]

ADVISORY = (
    "Design aid only. Before these gains act on equipment, commissioning follows the site's "
    "management-of-change procedure, simulation and testing, and review by a licensed engineer "
    "under local codes."
)

#: Bounds of ``analysis.points`` (the frequency grid of the robustness block).
MIN_FREQUENCY_POINTS = 10
MAX_FREQUENCY_POINTS = 2000


class DesignAnalysis(RequestModel):
    """What to add to the answer beyond gains, conditioning and poles."""

    sampled_model: bool = Field(
        default=False, description="Return the sampled A, B, C the design used (under plant.sampled_model)."
    )
    frequency: bool = Field(
        default=False,
        description="Return the robustness block: sensitivities, peaks, bandwidth and margins of the loop with "
        "the request's estimator, at the plant input and output.",
    )
    points: Annotated[int, Field(strict=True, ge=MIN_FREQUENCY_POINTS, le=MAX_FREQUENCY_POINTS)] = Field(
        default=200,
        description=f"Frequencies of the grid of the robustness block, {MIN_FREQUENCY_POINTS} to "
        f"{MAX_FREQUENCY_POINTS} (and within the service's work cap for the loop's size).",
    )
    model_error: ModelErrorRequest | None = Field(
        default=None,
        description="Return model_error: the spectral radius of the loop (controller and the request's estimator "
        "designed on the model) on the model with every gain multiplied by each factor and every dead time "
        "lengthened by each number of samples, with a verdict per case and the range of factors found stable.",
    )


class DesignRequest(RequestModel):
    """A plant model with tuning: everything needed to design the predictive controller."""

    model: PlantModel
    horizons: Horizons
    weights: Weights
    analysis: DesignAnalysis = Field(default_factory=DesignAnalysis)
    estimator: EstimatorRequest = Field(
        default_factory=EstimatorRequest,
        description="The estimator that closes the loop: /design uses it for analysis.frequency and "
        "analysis.model_error only, /simulate for the run.",
    )
    limits: LimitsRequest | None = Field(
        default=None,
        description="Limits on inputs, moves and outputs: /simulate solves a QP under them at every step; "
        "/design checks the unconstrained law against them for a nominal setpoint step (limit_check).",
    )
    zones: list[OutputZone | None] | None = Field(
        default=None,
        description="Per controlled output, a range to hold it in instead of a setpoint (null: a setpoint "
        "output). A zone output has no setpoint weight (weights.output 0 for it), so the unconstrained gains "
        "of /design do not act on it; the move QP of /simulate weights it only outside its zone, with or "
        "without limits.",
    )


class GainLabels(ResponseModel):
    """Names of the rows and columns of each gain matrix."""

    rows: list[str] = Field(description="Manipulated variables: the rows of every gain.")
    horizon: list[str] = Field(description="Columns of Kh: controlled output and prediction step.")
    state: list[str] = Field(description="Columns of Kx: the states.")
    previous_input: list[str] = Field(description="Columns of Ku: the manipulated variables.")
    setpoint: list[str] = Field(description="Columns of Kr: the controlled outputs.")
    disturbance: list[str] = Field(description="Columns of Kd: the measured disturbances.")
    input_target: list[str] = Field(
        default_factory=list, description="Columns of Kt: the input targets of the manipulated variables."
    )


class GainReport(ResponseModel):
    """The first-move gain in both forms: du(k) = Kh E = Kr r - Kx x(k) - Ku u(k-1) - Kd d(k).

    In engineering units of the tagged signals (scaling, when given, changes the design's
    weights, not the units of the gains).
    """

    horizon: MatrixOut = Field(description="Kh, m x (Hp-Hw+1)*p: gain on the free-response error E.")
    state: MatrixOut = Field(description="Kx, m x n: gain on the state x(k).")
    previous_input: MatrixOut = Field(description="Ku, m x m: gain on the previous input u(k-1).")
    setpoint: MatrixOut = Field(description="Kr, m x p: gain on a constant setpoint r.")
    disturbance: MatrixOut | None = Field(
        default=None, description="Kd, m x md: feed-forward gain on the measured disturbances d(k); null without any."
    )
    input_target: MatrixOut | None = Field(
        default=None,
        description="Kt, m x m: gain on the input targets u_target in du = Kr r + Kt u_target - Kx x - Ku u(k-1) "
        "(with weights.input; null without). Kr and Ku then include the input-target term, and Kt is zero "
        "where the setpoints leave the inputs no spare direction.",
    )
    labels: GainLabels


class HessianReport(ResponseModel):
    """Conditioning of the Hessian H = G'QG + R (+ L'SL with input targets, weights.input)."""

    condition_number: FiniteFloat = Field(description="Exact 2-norm condition number.")
    smallest_eigenvalue: FiniteFloat
    largest_eigenvalue: FiniteFloat
    size: int = Field(description="Dimension Hu*m.")


class PoleReport(ResponseModel):
    """One closed-loop pole in the z-plane."""

    real: FiniteFloat
    imag: FiniteFloat


class MarginalModeReport(ResponseModel):
    """A closed-loop pole on the unit circle and what holds it there."""

    pole: PoleReport
    cause: Literal[
        "free_input_direction",
        "input_reaches_no_output",
        "unweighted_output",
        "zone_output",
        "unobservable_mode",
        "uncontrollable_mode",
        "tuning",
    ] = Field(
        description="'free_input_direction': a direction of the inputs that changes no weighted output "
        "at steady state (more inputs than outputs; fix: input targets, weights.input with "
        "scenario.input_targets); "
        "'input_reaches_no_output': an input no weighted output responds to within the prediction "
        "horizon; 'unweighted_output': a plant mode on the circle (an integrating level) seen only by "
        "outputs with weight 0; 'zone_output': a mode or input direction that only zone outputs see (by "
        "design: inside its zone an output has no weight; the move QP holds it there, the gains do not); "
        "'unobservable_mode': a plant mode no output shows; "
        "'uncontrollable_mode': a plant mode no input moves; 'tuning': none of these."
    )
    signals: list[str] = Field(
        description="Tags of the signals the mode concerns: inputs, then outputs, then model states."
    )
    direction: list[FiniteFloat] | None = Field(
        default=None,
        description="The input direction of a 'free_input_direction' mode (held along it, the inputs change no "
        "weighted output at steady state) or of a 'zone_output' one (it moves only zone outputs): one entry per "
        "input in model order, in the inputs' own units, largest entry 1.",
    )


class ClosedLoopReport(ResponseModel):
    """Poles of the loop on [x; u(k-1)] and the stability verdict."""

    poles: list[PoleReport] = Field(description="Sorted by descending modulus.")
    spectral_radius: FiniteFloat
    stable: bool = Field(
        description="True when every pole has modulus below 1 - 1e-6 and no pole is held on the unit "
        "circle by a structural cause (see marginal_modes). A pole within 1e-6 of the circle is "
        "marginal, never unstable; unstable_closed_loop is only for a pole above 1 + 1e-6."
    )
    marginal_modes: list[MarginalModeReport] = Field(
        default_factory=list,
        description="Every closed-loop pole on the unit circle (within 1e-6) with its cause and the "
        "signals it concerns; each cause also gives one warning with the fix that removes it.",
    )


class SignalReport(ResponseModel):
    """A signal as the design used it."""

    name: str
    unit: str | None
    span: float


class LabelledMatrix(ResponseModel):
    """A matrix with named rows and columns; null where a value does not exist."""

    rows: list[str]
    columns: list[str]
    values: list[list[float | None]]


class SampledModelReport(ResponseModel):
    """The discrete model the design used, in engineering units."""

    a: MatrixOut
    b: MatrixOut
    c: MatrixOut
    b_disturbance: MatrixOut | None
    c_measured: MatrixOut
    d_measured: MatrixOut


class PlantReport(ResponseModel):
    """Open-loop facts about the plant."""

    states: int = Field(description="State count of the discrete model (dead-time states included).")
    sample_time: float
    inputs: list[SignalReport]
    outputs: list[SignalReport]
    disturbances: list[SignalReport]
    measured: list[SignalReport]
    steady_state_gain: LabelledMatrix = Field(
        description="Outputs x inputs, engineering units; null for an integrating pair (no finite gain)."
    )
    ramp_rate: LabelledMatrix = Field(
        description="Output change per sample per unit input once a ramp is established (0 for pairs that settle)."
    )
    relative_gain_array: LabelledMatrix | None = Field(
        description="Bristol's relative gain array at steady state; null unless the gain is square, finite and nonsingular."
    )
    gain_condition_number: float | None = Field(
        description="2-norm condition number of the steady-state gain of the signals as given, each divided by "
        "its span where it has one: it changes with the units of signals without spans (see "
        "balanced_gain_condition_number). Null when some pair integrates, or when the gain is singular (an "
        "infinite condition number; the near_singular_gain warning says so)."
    )
    balanced_gain_condition_number: float | None = Field(
        default=None,
        description="2-norm condition number of the steady-state gain with its rows and columns equilibrated "
        "(each scaled to unit largest magnitude): the same in any units, at or a little above the least "
        "condition number over all scalings of the signals. The near_singular_gain warning judges it unless "
        "every input and every output has a span. Null as gain_condition_number is.",
    )
    open_loop_poles: list[PoleReport]
    sampled_model: SampledModelReport | None = Field(default=None, description="When analysis.sampled_model is true.")
    reduction: ReductionReport | None = Field(
        default=None, description="For a step-response model with a reduction: what the balanced truncation kept."
    )


class WarningReport(ResponseModel):
    """A numerical or behavioural warning about the design."""

    code: str
    message: str


class SkippedDiagnostic(ResponseModel):
    """A diagnostic left out, and why."""

    name: str
    reason: str


class DiagnosticsReport(ResponseModel):
    """Which diagnostics this answer holds."""

    computed: list[str] = Field(
        description="Names of the diagnostics computed for this answer: hessian_eigenvalues, closed_loop_poles, "
        "open_loop_poles, steady_state_gain, relative_gain_array, hessian_what_if (the advice's condition "
        "numbers with heavier move weights and a shorter control horizon, when the Hessian is ill-conditioned), "
        "slow_pole, transmission_zeros (square plants), uncontrollable_modes, frequency_analysis, limit_check, "
        "model_error."
    )
    hessian_eigenvalue_method: Literal["dense", "lanczos"] = Field(
        description="How the Hessian's extreme eigenvalues were found: LAPACK's dense symmetric eigensolver, or "
        "(above 400 rows) the Lanczos method with the Cholesky factor, to the same accuracy."
    )
    skipped: list[SkippedDiagnostic] = Field(
        default_factory=list,
        description="Diagnostics left out by a work budget, each with the reason; empty when every one that "
        "applies was computed.",
    )


class DesignResponse(ResponseModel):
    """The designed controller and its diagnostics."""

    gain: GainReport
    hessian: HessianReport
    closed_loop: ClosedLoopReport
    plant: PlantReport
    warnings: list[WarningReport]
    robustness: RobustnessReport | None = Field(
        default=None, description="When analysis.frequency is true: the loop in frequency (scaled signals)."
    )
    limit_check: LimitCheckReport | None = Field(
        default=None, description="When the request has limits: does the unconstrained law alone break them?"
    )
    model_error: ModelErrorReport | None = Field(
        default=None,
        description="When analysis.model_error is given: how much uniform gain error and extra dead time, and "
        "which gain errors per input, the tuning tolerates (scaled signals; a design aid, not a guarantee for "
        "other kinds of model error).",
    )
    zones: list[ZoneReport] | None = Field(
        default=None,
        description="When the request has zones: each zone output, held only by the move QP (not by the gains).",
    )
    diagnostics: DiagnosticsReport | None = Field(
        default=None, description="Which diagnostics this answer holds and which a work budget left out."
    )
    fingerprint: str = Field(description="SHA-256 of the canonical request: equal for equal requests on any replica.")
    advisory: str = Field(default=ADVISORY, description="Results are design aids; see the text.")
