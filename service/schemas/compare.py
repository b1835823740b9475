"""POST /design/compare: the design in service against a proposed one, for a change review."""

from __future__ import annotations

from pydantic import Field

from service.schemas.common import RequestModel, ResponseModel
from service.schemas.design import ADVISORY, DesignRequest, DesignResponse, PoleReport
from service.schemas.simulate import PerformanceReport, ScenarioRequest

__all__ = [
    "CompareRequest",
    "CompareResponse",
    "DominantPoleReport",
    "FigureChange",
    "GainChange",
    "LoopRobustnessChange",
    "RobustnessChange",
    "ScenarioComparison",
    "SideReport",
]


class CompareRequest(RequestModel):
    """Two /design requests (each with its estimator and limits), and what to compare them on."""

    in_service: DesignRequest = Field(description="The design now in service.")
    proposed: DesignRequest = Field(
        description="The proposed design: the same manipulated variables, controlled outputs and measured "
        "disturbances (tags), any model, tuning or estimator."
    )
    robustness: bool = Field(
        default=False,
        description="Also compare the robustness figures (peaks, margins): as analysis.frequency true on both "
        "requests. A request that asks for analysis.frequency itself is compared on it either way.",
    )
    scenario: ScenarioRequest | None = Field(
        default=None,
        description="The scenario both designs run (as /simulate runs it, each with its own estimator). Default: "
        "a setpoint step of one span (without one, of the output's natural size, the size of the default filter's "
        "noise for it, so that no unit decides the figures) on every controlled output at once, on each design's own "
        "model, long enough for the slower design to settle.",
    )


class GainChange(ResponseModel):
    """One entry of the law du = Kr r - Kx x - Ku u(k-1) - Kd d, before and after."""

    gain: str = Field(description="'setpoint' (Kr), 'state' (Kx), 'previous_input' (Ku) or 'disturbance' (Kd).")
    row: str = Field(description="The manipulated variable (tag).")
    column: str = Field(description="The setpoint, state, previous input or measured disturbance.")
    in_service: float | None = Field(description="Null where the design in service has no such entry.")
    proposed: float | None = Field(description="Null where the proposed design has no such entry.")
    change: float | None = Field(description="proposed - in_service.")
    relative_change: float | None = Field(description="change / |in_service|; null where in_service is 0 or absent.")
    scaled_change: float | None = Field(
        description="change * size(column) / size(row): the change between the signals divided by their sizes, "
        "a tag's span where it has one, else its natural size in its own unit (a state's natural size for Kx; 1 "
        "for a measured disturbance without a span and for a state no output sees), from the in-service design's "
        "model, the proposed one's for what only it has. It does not depend on the units the tags are written in; "
        "the list is ranked by it. Null where either design has no such entry."
    )


class DominantPoleReport(ResponseModel):
    """The closed-loop pole of largest modulus."""

    pole: PoleReport
    modulus: float
    time_constant: float | None = Field(
        description="-sample_time / ln|z| in the model's time unit; null for a pole on or outside the unit circle "
        "or at 0."
    )


class SideReport(ResponseModel):
    """What one design is, in figures."""

    fingerprint: str = Field(description="The fingerprint /design gives this request.")
    poles: list[PoleReport] = Field(description="Closed-loop poles, by descending modulus (as /design).")
    dominant_pole: DominantPoleReport
    settling_pole: DominantPoleReport | None = Field(
        default=None,
        description="The pole of largest modulus once the poles of closed_loop.marginal_modes are set aside (a "
        "zone output's integrator, a free input direction: on the unit circle by a named cause): the mode "
        "the loop settles by; equal to dominant_pole when no pole is set aside, null when none is left.",
    )
    stable: bool
    hessian_condition_number: float
    warnings: list[str] = Field(description="Codes of /design's warnings.")


class LoopRobustnessChange(ResponseModel):
    """Robustness figures of the loop broken at one point, before and after."""

    peak_sensitivity: list[float] = Field(description="[in service, proposed].")
    peak_complementary: list[float] = Field(description="[in service, proposed].")
    bandwidth: list[float | None]
    gain_margin: list[float | None] = Field(description="Single loops only; null otherwise or when infinite.")
    phase_margin: list[float | None]


class RobustnessChange(ResponseModel):
    """The robustness figures of both designs (scaled signals, as /design reports them)."""

    plant_input: LoopRobustnessChange
    plant_output: LoopRobustnessChange
    plant_output_signals: list[list[str]] = Field(
        description="Per design (in service, proposed): the tags the plant_output loop is broken at, as "
        "/design's robustness.plant_output_signals (the measured outputs' own tags for a model with sensors "
        "of its own)."
    )


class FigureChange(ResponseModel):
    """Step figures of one controlled output in the scenario, before and after."""

    name: str
    rise_time: list[float | None] = Field(description="[in service, proposed].")
    settling_time: list[float | None]
    overshoot_percent: list[float | None]
    integral_absolute_error: list[float | None]
    zone: bool = Field(
        default=False,
        description="A zone output (zones): held in its range by the move QP, it has no setpoint to settle at, "
        "so it has no settling figures.",
    )
    settling_change_percent: float | None = Field(
        description="100 (proposed - in service) / in service of the settling time (negative: faster)."
    )


class ScenarioComparison(ResponseModel):
    """One scenario run with both designs, as /simulate answers each."""

    default: bool = Field(description="True when the default scenario was run.")
    scenario: ScenarioRequest = Field(description="The scenario run (the default written out, or the caller's).")
    in_service: PerformanceReport
    proposed: PerformanceReport
    outputs: list[FigureChange]
    diverged: list[bool] = Field(description="[in service, proposed]: the run blew up.")


class CompareResponse(ResponseModel):
    """The change from the design in service to the proposed one."""

    summary: list[str] = Field(description="Plain-language sentences for the change record.")
    gain_changes: list[GainChange] = Field(
        description="Every entry of Kr, Kx, Ku and Kd, largest |scaled_change| first, unmatched entries last."
    )
    in_service: SideReport
    proposed: SideReport
    robustness: RobustnessChange | None = Field(description="When asked (robustness, or analysis.frequency on both).")
    scenario: ScenarioComparison
    in_service_design: DesignResponse = Field(description="The design in service, as /design answers it.")
    proposed_design: DesignResponse = Field(description="The proposed design, as /design answers it.")
    advisory: str = Field(default=ADVISORY)
