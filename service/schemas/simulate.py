"""POST /simulate: the request and response models.

The request is a /design request (it subclasses :class:`DesignRequest`, so the two cannot
drift apart; the ``estimator`` is one of its fields, :mod:`service.schemas.estimator`) plus a
``scenario``.  Every value is in the engineering units of the model's tags; covariances are
in those units squared.
"""

from __future__ import annotations

from typing import Annotated

from pydantic import Field

from service.schemas.common import FiniteFloat, RequestModel, ResponseModel, Vector
from service.schemas.design import (
    DesignRequest,
    DesignResponse,
    LabelledMatrix,
    MarginalModeReport,
    PoleReport,
    WarningReport,
)
from service.schemas.estimator import EstimatorRequest
from service.schemas.limits import LimitRunReport, LimitSummary, ZoneRunReport
from service.schemas.model import PlantModel

__all__ = [
    "DisturbanceChange",
    "EstimatorReport",
    "EstimatorRequest",
    "InitialConditions",
    "InputFigures",
    "InputTargetChange",
    "MeasurementNoise",
    "OutputFigures",
    "PerformanceReport",
    "ScenarioRequest",
    "SeriesColumns",
    "SetpointChange",
    "SimulateRequest",
    "SimulateResponse",
    "WholeLoopReport",
]

StepIndex = Annotated[int, Field(strict=True, ge=0)]
Spread = Annotated[FiniteFloat, Field(ge=0)]


class SetpointChange(RequestModel):
    """A new setpoint for every controlled output, held from ``step`` on."""

    step: StepIndex = Field(description="Step of the change, 0 <= step < scenario.steps.")
    setpoint: Vector = Field(description="One value per controlled output, engineering units.")


class DisturbanceChange(RequestModel):
    """A new disturbance level, held from ``step`` on (it replaces the previous level)."""

    step: StepIndex = Field(description="Step of the change, 0 <= step < scenario.steps.")
    value: Vector = Field(
        description="One value per controlled output (output disturbances), per manipulated variable "
        "(input disturbances) or per measured disturbance, engineering units."
    )


class InputTargetChange(RequestModel):
    """New input targets for every manipulated variable, held from ``step`` on."""

    step: StepIndex = Field(description="Step of the change, 0 <= step < scenario.steps.")
    value: Vector = Field(description="One target per manipulated variable, engineering units.")


class MeasurementNoise(RequestModel):
    """White Gaussian noise on the measured outputs, seeded so that a run repeats exactly."""

    std: list[Spread] = Field(
        description="Standard deviation per measured output, engineering units (per controlled output when "
        "the model has no measured outputs of its own)."
    )
    seed: Annotated[int, Field(strict=True, ge=0, le=2**63 - 1)] = Field(
        default=0, description="Seed of the noise generator: the same seed gives the same noise."
    )


class InitialConditions(RequestModel):
    """Where the run starts; by default at rest at the origin."""

    state: Vector | None = Field(
        default=None, description="x(0), one value per model state (default zeros); the estimator starts there too."
    )
    input: Vector | None = Field(default=None, description="u(-1), one value per manipulated variable (default zeros).")
    setpoint: Vector | None = Field(
        default=None, description="Setpoint before the first change (default: the outputs at x(0))."
    )


class ScenarioRequest(RequestModel):
    """What happens during the run: setpoint changes, disturbances, noise, a plant that differs."""

    steps: Annotated[int, Field(strict=True, ge=1)] = Field(
        description="Number of simulated samples (the run lasts steps x sample_time)."
    )
    setpoint_changes: list[SetpointChange] = Field(default_factory=list)
    output_disturbances: list[DisturbanceChange] = Field(
        default_factory=list,
        description="Unmeasured steps added to the controlled outputs. With measured outputs of their own "
        "(model.c_measured), a measured output sees such a step only when it is that output's own signal "
        "(the same row of c, no d_measured).",
    )
    input_disturbances: list[DisturbanceChange] = Field(
        default_factory=list, description="Unmeasured steps added to the manipulated variables at the plant."
    )
    measured_disturbances: list[DisturbanceChange] = Field(
        default_factory=list,
        description="Levels of the model's measured disturbances (b_disturbance or disturbance_elements), "
        "applied to the plant and fed forward through the design's Kd.",
    )
    input_targets: Vector | None = Field(
        default=None,
        description="u_target: one target per manipulated variable (engineering units; absolute with "
        "model.operating_point) that weights.input pulls the inputs towards, in the spare directions only "
        "(the outputs settle on their setpoints first). Default: the operating point's inputs (0 without "
        "one). Used only with weights.input; a target outside the input limits is allowed and reported.",
    )
    input_target_changes: list[InputTargetChange] = Field(
        default_factory=list, description="New input targets, held from their step on."
    )
    measurement_noise: MeasurementNoise | None = Field(default=None, description="Default: no noise.")
    true_plant: PlantModel | None = Field(
        default=None,
        description="The plant the loop runs on, in any model form (default: the model itself). Same "
        "inputs, outputs and sample time as the model; its state count may differ when "
        "initial.state is not given and the estimator is not full_state. With measured outputs of their "
        "own it has as many (its own c_measured, the model's tags) and the model's d_measured.",
    )
    initial: InitialConditions = Field(default_factory=InitialConditions)


class SimulateRequest(DesignRequest):
    """A /design request (its ``estimator`` included) with a scenario: everything needed to preview the loop."""

    scenario: ScenarioRequest


class SeriesColumns(ResponseModel):
    """Names of the columns of each time series (also the CSV header)."""

    outputs: list[str] = Field(description="Controlled outputs (their tags).")
    measured: list[str] = Field(
        description="The measured outputs: '<output>.measured' per controlled output, or the measured outputs' "
        "own tags when the model has them (model.c_measured, d_measured)."
    )
    setpoints: list[str]
    inputs: list[str] = Field(description="Manipulated variables (their tags).")
    estimates: list[str] = Field(description="Estimated states, then the estimated disturbances.")
    measured_disturbances: list[str]
    measured_own: bool = Field(
        default=False,
        description="True when the measured outputs are signals of their own (model.c_measured other than c, "
        "or d_measured): the CSV answer then has their columns too.",
    )


class OutputFigures(ResponseModel):
    """Step figures of one controlled output, for its last setpoint change.

    Times in the model's time unit from the step instant; null where a figure does not exist
    (no setpoint change, never reached 90 %, not settled within the run, a run that blew up).
    """

    name: str
    zone: bool = Field(
        default=False,
        description="A zone output, held in its range rather than at a setpoint: every figure here is null; "
        "the answer's zones entry for it says how it kept to its range.",
    )
    step: int | None = Field(description="Step of the last setpoint change of this output.")
    rise_time: float | None = Field(description="From 10 % to 90 % of the setpoint step.")
    settling_time: float | None = Field(description="Until the output stays within 2 % of the setpoint step.")
    overshoot_percent: float | None
    integral_absolute_error: float | None = Field(
        description="Sum of |setpoint - output| x sample time from the last change (whole run without one)."
    )
    final_offset: float | None = Field(description="Setpoint minus output at the last step.")


class InputFigures(ResponseModel):
    """Move figures of one manipulated variable over the whole run."""

    name: str
    total_move: float | None = Field(description="Sum of |du(k)|, engineering units.")
    largest_move: float | None = Field(description="Largest |du(k)|, engineering units.")


class PerformanceReport(ResponseModel):
    """Figures of merit per controlled output and per manipulated variable."""

    outputs: list[OutputFigures]
    inputs: list[InputFigures]


class EstimatorReport(ResponseModel):
    """The estimator the run used."""

    kind: str
    disturbance: str = Field(description="Disturbance model in use: 'per_output', 'output', 'input' or 'none'.")
    disturbances: list[str] | None = Field(
        default=None,
        description="For 'per_output': per measured output, 'output' (a step bias on the output) or 'rate' (a "
        "step bias on its rate, for an integrating output).",
    )
    gain: LabelledMatrix | None = Field(
        description="Filter gain L of x(k|k) = x(k|k-1) + L (y(k) - D_m u(k) - C_m x(k|k-1)), engineering "
        "units: rows the estimates, columns the measured outputs. Null for full_state."
    )
    poles: list[PoleReport] = Field(description="Eigenvalues of (I - L C) A, by descending modulus.")
    spectral_radius: float


class WholeLoopReport(ResponseModel):
    """Poles of plant, controller and estimator together, and the separation check."""

    poles: list[PoleReport] = Field(description="Of the loop on [x; x(k|k-1); u(k-1)], descending modulus.")
    controller_poles: list[PoleReport]
    estimator_poles: list[PoleReport]
    separation_holds: bool = Field(description="The poles are the union of controller and estimator poles.")
    separation_error: float = Field(description="Largest distance between a pole and its partner in that union.")
    spectral_radius: float
    stable: bool = Field(
        description="Every pole below 1 - 1e-6 in modulus and no marginal mode (as closed_loop.stable)."
    )
    marginal_modes: list[MarginalModeReport] = Field(
        default_factory=list,
        description="The poles on the unit circle with their causes: those of the design's closed loop "
        "(the estimator's poles are strictly stable).",
    )


class TrueLoopReport(ResponseModel):
    """The loop of the controller and estimator (designed on the model) analysed on the true plant."""

    poles: list[PoleReport] = Field(
        description="Of the loop on [x_true; x(k|k-1); u(k-1)] (setpoint at zero), descending modulus."
    )
    spectral_radius: float
    stable: bool = Field(description="Every pole below 1 - 1e-6 in modulus.")


class SimulateResponse(ResponseModel):
    """The loop's response to the scenario, with the design and estimator that produced it.

    Each series has one row per step (``time[k] = k x sample_time``); a run that blew up stops
    at ``diverged_at`` (JSON has no NaN, so the series are cut there).
    """

    steps: int = Field(description="Steps requested.")
    sample_time: float
    time: list[float]
    outputs: list[list[float]] = Field(description="True controlled outputs (noise-free), engineering units.")
    measured: list[list[float]] = Field(
        description="The measured outputs y_m(k) = C_m x(k) + D_m u(k), with noise and the output disturbances "
        "they see (the controlled outputs with noise when the model has no measured outputs of its own). "
        "The estimator reads y_m(k) - D_m u(k), u(k) the input applied at step k. Absolute with "
        "model.operating_point: around operating_point.measured for measured outputs of their own."
    )
    setpoints: list[list[float]]
    inputs: list[list[float]] = Field(description="u(k), applied from step k to k+1.")
    estimates: list[list[float]] = Field(description="x(k|k): states, then disturbance estimates.")
    measured_disturbances: list[list[float]]
    columns: SeriesColumns
    true_loop: TrueLoopReport | None = Field(
        default=None,
        description="With a true_plant: the loop of this controller and estimator on the true plant "
        "(warning true_loop_unstable when a pole lies outside the unit circle).",
    )
    diverged_at: int | None = Field(
        description="The step from which the run grows without bound: the first step not computed because "
        "the numbers overflowed (the series stop there), or the first step at which the outputs and inputs "
        "exceed 1000 times the scenario's own size (in spans; a signal without a span in its natural size) "
        "while still growing by more than 0.1 % per "
        "sample (the series run to the end; warning run_diverging). Null for a bounded run."
    )
    performance: PerformanceReport
    estimator: EstimatorReport
    whole_loop: WholeLoopReport
    design: DesignResponse = Field(description="The design the run used, as POST /design answers it.")
    limits: LimitRunReport | None = Field(
        default=None, description="With limits: the move QP at the steps where the limits mattered."
    )
    zones: list[ZoneRunReport] | None = Field(
        default=None,
        description="With zones: per zone output its zone (engineering units) and whether the run kept it "
        "there, ended inside, and its largest excursion.",
    )
    limit_summary: LimitSummary | None = Field(
        default=None, description="With limits: time at each limit, fallbacks, corrected setpoints, largest slack."
    )
    warnings: list[WarningReport] = Field(description="About the run (the design's own are under design).")
    fingerprint: str = Field(description="SHA-256 of the canonical request: equal for equal requests.")
    advisory: str
