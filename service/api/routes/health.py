"""GET /healthz (the process is alive) and GET /readyz (it accepts work)."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse

from service import __version__

__all__ = ["router"]

router = APIRouter(tags=["health"])


@router.get("/healthz")
def healthz() -> dict[str, str]:
    """Liveness: answers as long as the process serves HTTP."""
    return {"status": "ok", "version": __version__}


@router.get("/readyz", responses={503: {"description": "Starting or shutting down."}})
def readyz(request: Request) -> JSONResponse:
    """Readiness: 200 while the service accepts work, 503 while starting or shutting down."""
    ready = bool(getattr(request.app.state, "ready", False))
    return JSONResponse({"status": "ready" if ready else "not_ready"}, status_code=200 if ready else 503)
