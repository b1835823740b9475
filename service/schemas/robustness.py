"""The ``robustness`` block of POST /design: the loop in frequency, broken at the plant input and output.

Asked for by ``analysis: {"frequency": true, "points": N}``; computed by
:func:`service.solver.evaluation.frequency.design_frequency_analysis` on the design and its estimator
(the request's ``estimator``, by default that of /simulate).

Units.  Frequencies are in rad per time unit of the model's sample time (rad/min for a
sample time in minutes), on a log-spaced grid of ``points`` frequencies that ends at the
Nyquist frequency ``pi / sample_time`` and starts four decades below it, or lower: a decade
below the slowest pole of the plant, the controller and the closed loop (at most twelve
decades), so a slow loop's crossovers are on it.  The loop is the
design's, in scaled signals (``u / span``, ``z / span``): for a multivariable loop the
singular values of S and T, and so their peaks and the bandwidth, are those of the scaled
signals and change with the spans (a diagonal change of units changes singular values); for
a single loop S, T and the classical margins do not depend on the spans.

Break points.  At the plant input the controller is a system from what it reads to the
inputs, so the loop is well defined whatever it reads.  At the plant output the loop is
broken where the controller reads the plant: with measured outputs of their own
(``model.c_measured``) that is at those measured outputs (the sensors), not at the
controlled outputs, which are only inferred; ``plant_output_signals`` names the signals.
"""

from __future__ import annotations

from pydantic import Field

from service.schemas.common import ResponseModel

__all__ = [
    "LoopRobustnessReport",
    "MarginsReport",
    "RobustnessEstimatorReport",
    "RobustnessReport",
    "SingularValueReport",
]


class MarginsReport(ResponseModel):
    """Classical margins of a single loop (one manipulated variable, one measured output).

    Null stands for infinite: no phase crossover (``L`` never real and negative) gives no
    gain margin, no gain crossover (``|L|`` never 1) no phase margin.
    """

    gain_margin: float | None = Field(
        description="Factor by which the loop gain may change before the loop becomes unstable (below 1: a decrease)."
    )
    gain_margin_db: float | None = Field(description="20 log10 of the gain margin.")
    phase_crossover_frequency: float | None = Field(
        description="Where L is real and negative, rad per time unit; 0 when that is at zero frequency "
        "(a loop without integral action whose phase starts at -180 degrees)."
    )
    phase_margin: float | None = Field(description="Degrees, in (-180, 180].")
    gain_crossover_frequency: float | None = Field(description="Where |L| = 1, rad per time unit.")


class SingularValueReport(ResponseModel):
    """Largest and smallest singular value of a transfer matrix at each grid frequency."""

    largest: list[float] = Field(description="One per frequency of robustness.frequencies.")
    smallest: list[float] = Field(description="One per frequency (equal to largest for a single loop).")


class LoopRobustnessReport(ResponseModel):
    """The loop broken at one point: L = -K P at the plant input, L = -P K at the plant output.

    S = (I + L)^-1 (sensitivity) and T = L (I + L)^-1 (complementary sensitivity), S + T = I.
    """

    peak_sensitivity: float = Field(description="Ms = max over frequency of the largest singular value of S.")
    peak_sensitivity_db: float = Field(description="20 log10 Ms.")
    peak_sensitivity_frequency: float = Field(description="Where Ms occurs, rad per time unit.")
    peak_complementary: float = Field(description="Mt = max over frequency of the largest singular value of T.")
    peak_complementary_frequency: float = Field(description="Where Mt occurs, rad per time unit.")
    bandwidth: float | None = Field(
        description="Lowest frequency where the largest singular value of S first rises through 1/sqrt(2) "
        "(-3 dB), rad per time unit; null when it never does on the grid."
    )
    margins: MarginsReport | None = Field(description="For a single loop (1 x 1) only; null otherwise.")
    sensitivity: SingularValueReport = Field(description="Singular values of S over the grid.")
    complementary: SingularValueReport = Field(description="Singular values of T over the grid.")


class RobustnessEstimatorReport(ResponseModel):
    """The estimator inside the analysed loop."""

    kind: str
    disturbance: str = Field(description="Disturbance model in use: 'per_output', 'output', 'input' or 'none'.")
    disturbances: list[str] | None = Field(
        default=None, description="For 'per_output': per output, 'output' or 'rate' (as estimator.disturbances)."
    )
    spectral_radius: float = Field(description="Largest modulus of the estimator's poles (0 for full_state).")


class RobustnessReport(ResponseModel):
    """Sensitivities of the loop of controller, estimator and plant; see the notes on units and scaling."""

    frequencies: list[float] = Field(description="The grid, rad per time unit of the sample time, ascending.")
    nyquist_frequency: float = Field(description="pi / sample_time, the last grid frequency.")
    plant_input: LoopRobustnessReport = Field(
        description="The loop broken at the plant input (the manipulated variables): L = -K P, m x m."
    )
    plant_output: LoopRobustnessReport = Field(
        description="The loop broken where the controller reads the plant, L = -P K: at the controlled outputs "
        "when the estimator reads them; with measured outputs of their own (model.c_measured) at those measured "
        "outputs, the sensors, which is where the loop exists physically (the controlled outputs are then "
        "inferred, not fed back); at the plant states for a full_state estimator. plant_output_signals names "
        "them."
    )
    plant_output_signals: list[str] = Field(
        description="The tags of the signals the plant_output loop is broken at, in order: the controlled "
        "outputs', the measured outputs' own (model.measured) or the state labels (full_state)."
    )
    estimator: RobustnessEstimatorReport
    spectral_radius: float = Field(
        description="Largest modulus of the poles of plant, controller and estimator together."
    )
    stable: bool = Field(
        description="Every pole of that loop below 1 - 1e-6 in modulus, as closed_loop.stable (a pole within "
        "1e-6 of the circle, such as a zone output's, is marginal: not stable); margins and peaks speak about "
        "robustness only when no pole lies outside the circle."
    )
