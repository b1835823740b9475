"""GET /healthz and GET /readyz answers."""

from __future__ import annotations

from typing import Literal

from pydantic import Field

from service.schemas.common import ResponseModel

__all__ = ["HealthReport", "ReadinessReport"]


class HealthReport(ResponseModel):
    """Liveness: the process serves HTTP."""

    status: Literal["ok"]
    version: str = Field(description="The service's version.")


class ReadinessReport(ResponseModel):
    """Readiness: answered 200 with 'ready' while the service accepts work, 503 with 'not_ready' otherwise."""

    status: Literal["ready", "not_ready"]
