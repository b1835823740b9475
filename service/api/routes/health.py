"""GET /healthz (the process is alive) and GET /readyz (it accepts work).

Both handlers are ``async`` and touch nothing but the app's state and the solver pools'
counts: they run on the event loop itself, never in the thread pool or the solver processes the compute routes wait in,
so a probe answers at once however busy the solvers are.  ``HEAD /healthz`` answers the same
status without a body (load balancers and ``curl -I`` use it).
"""

from __future__ import annotations

import asyncio

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse, Response

from service import __version__
from service.api.compute import solver_lanes
from service.schemas.health import HealthReport, ReadinessReport

__all__ = ["router"]

router = APIRouter(tags=["health"])


# documented by ``responses`` and not checked by a response model: /healthz is the floor
# other requests are measured against, and a model would validate every answer
@router.get(
    "/healthz",
    response_model=None,
    responses={200: {"model": HealthReport, "description": "The process serves HTTP."}},
)
async def healthz() -> dict[str, str]:
    """Liveness: answers as long as the process serves HTTP."""
    return {"status": "ok", "version": __version__}


@router.head("/healthz", include_in_schema=False)
async def healthz_head() -> Response:
    """Liveness for ``HEAD``: the status of GET /healthz, no body."""
    return Response(status_code=200, media_type="application/json")


READINESS = {"application/json": {"schema": {"$ref": "#/components/schemas/ReadinessReport"}}}


@router.get(
    "/readyz",
    response_model=ReadinessReport,
    responses={
        200: {"description": "Accepting work: `status` is `ready`."},
        503: {
            "description": "Starting, shutting down, or a lane without a solver process (being started again): "
            "`status` is `not_ready`.",
            "content": READINESS,
        },
    },
)
async def readyz(request: Request) -> JSONResponse:
    """Readiness: 200 while the service accepts work, 503 while starting, shutting down or without a solver.

    Without a solver process in a lane (its replacement could not start), the lane's requests
    could only wait for their time limit; each call of the probe tries to start the missing ones.
    """
    ready = bool(getattr(request.app.state, "ready", False))
    if ready:
        ready = solver_lanes(request.app.state.settings).ready(asyncio.get_running_loop())
    return JSONResponse({"status": "ready" if ready else "not_ready"}, status_code=200 if ready else 503)
