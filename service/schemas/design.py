"""POST /design: the request and response models."""

from __future__ import annotations

from pydantic import Field

from service.schemas.common import FiniteFloat, Matrix, RequestModel, ResponseModel
from service.schemas.model import PlantModel
from service.schemas.tuning import Horizons, Weights

__all__ = [
    "ADVISORY",
    "ClosedLoopReport",
    "DesignRequest",
    "DesignResponse",
    "GainReport",
    "HessianReport",
    "PoleReport",
    "WarningReport",
]

ADVISORY = (
    "Design aid only. Before these gains act on equipment, commissioning follows the site's "
    "management-of-change procedure, simulation and testing, and review by a licensed engineer "
    "under local codes."
)


class DesignRequest(RequestModel):
    """A plant model with tuning: everything needed to design the predictive controller."""

    model: PlantModel
    horizons: Horizons
    weights: Weights


class GainReport(ResponseModel):
    """The first-move gain in both forms: du(k) = Kh E = Kr r - Kx x(k) - Ku u(k-1)."""

    horizon: Matrix = Field(description="Kh, m x (Hp-Hw+1)*p: gain on the free-response error E.")
    state: Matrix = Field(description="Kx, m x n: gain on the state x(k).")
    previous_input: Matrix = Field(description="Ku, m x m: gain on the previous input u(k-1).")
    setpoint: Matrix = Field(description="Kr, m x p: gain on a constant setpoint r.")


class HessianReport(ResponseModel):
    """Conditioning of the Hessian H = G'QG + R."""

    condition_number: FiniteFloat = Field(description="Exact 2-norm condition number.")
    smallest_eigenvalue: FiniteFloat
    largest_eigenvalue: FiniteFloat
    size: int = Field(description="Dimension Hu*m.")


class PoleReport(ResponseModel):
    """One closed-loop pole in the z-plane."""

    real: FiniteFloat
    imag: FiniteFloat


class ClosedLoopReport(ResponseModel):
    """Poles of the loop on [x; u(k-1)] and the stability verdict."""

    poles: list[PoleReport] = Field(description="Sorted by descending modulus.")
    spectral_radius: FiniteFloat
    stable: bool = Field(description="True when every pole lies strictly inside the unit circle.")


class WarningReport(ResponseModel):
    """A numerical or behavioural warning about the design."""

    code: str
    message: str


class DesignResponse(ResponseModel):
    """The designed controller and its diagnostics."""

    gain: GainReport
    hessian: HessianReport
    closed_loop: ClosedLoopReport
    warnings: list[WarningReport]
    fingerprint: str = Field(
        description="SHA-256 of the canonical request: equal for equal requests on any replica."
    )
    advisory: str = Field(default=ADVISORY, description="Results are design aids; see the text.")
