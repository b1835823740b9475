"""Tuning as requests carry it: horizons and weights."""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import Field

from service.schemas.common import Matrix, RequestModel, Vector

__all__ = ["Horizons", "Weights"]

Horizon = Annotated[int, Field(strict=True, ge=1)]


class Horizons(RequestModel):
    """Prediction horizon Hp, control horizon Hu and first penalized step Hw, in samples."""

    prediction: Horizon = Field(description="Prediction horizon Hp (samples), 1 <= Hp.")
    control: Horizon = Field(description="Control horizon Hu (moves), 1 <= Hu <= Hp.")
    first_penalized: Horizon = Field(
        default=1,
        description="First penalized prediction step Hw, 1 <= Hw <= Hp (default 1). The Riccati "
        "terminal weight gives the infinite-horizon gain only with Hw = 1.",
    )
    move_steps: Annotated[list[Annotated[int, Field(strict=True, ge=0)]], Field(min_length=1)] | None = Field(
        default=None,
        description="Move blocking: the steps j (0-based, starting at 0, increasing, below Hu) at which "
        "moves du(k+j) are allowed; between them the input is held. Default: a move at every step.",
    )


class Weights(RequestModel):
    """Output (controlled-variable) weights Q, move-suppression weights R and input-target weights S."""

    output: Vector | Matrix = Field(
        description="Q: one non-negative number per controlled output, or a full symmetric "
        "positive-semidefinite p x p matrix."
    )
    move: Vector | Matrix = Field(
        description="R (move suppression): one non-negative number per manipulated variable, or a "
        "full symmetric positive-semidefinite m x m matrix."
    )
    input: Vector | Matrix | None = Field(
        default=None,
        description="S (input targets): one non-negative number per manipulated variable, or a full "
        "symmetric positive-semidefinite m x m matrix, on u - u_target over the control horizon's "
        "predicted inputs. The law becomes du = Kr r + Kt u_target - Kx x - Ku u(k-1) (gain.input_target). "
        "Input targets act only in the spare directions: the steady-state target settles the outputs "
        "first, then puts the inputs nearest their targets, so reachable setpoints are still met "
        "exactly. With more inputs than outputs they fix the otherwise free input direction. The target "
        "values are scenario.input_targets of /simulate (default: the operating point's inputs, or 0 "
        "without one). Default: none (all zero is none). With terminal 'riccati' it is part of the "
        "terminal weight's stage cost and target as well.",
    )
    terminal: Literal["none", "riccati"] = Field(
        default="none",
        description="'riccati' puts the solution of the discrete Riccati equation of the incremental "
        "system on the last predicted [x; u] in place of the last step's output weight; with Hu = Hp "
        "and first_penalized = 1 the gain is then the infinite-horizon LQR gain for any horizon, and "
        "the loop is stable. With a later first penalized step the outputs before it carry no cost, so "
        "the gain is not the LQR gain and stability is not guaranteed: read it from closed_loop. The "
        "terminal penalty is on the distance from the steady-state target of the setpoint (and of the "
        "disturbance estimate, measured disturbances and input targets), so /simulate and "
        "/design/export run it offset-free. With weights.input the stage cost of the Riccati equation "
        "includes |u - u_s|^2_S, which is what lets more inputs than outputs take it: without input "
        "targets a steady input combination no output sees leaves the equation without a stabilizing "
        "solution (a 422 names the field that mends it). Not with zones.",
    )
