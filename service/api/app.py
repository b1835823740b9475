"""The application factory."""

from __future__ import annotations

from collections.abc import AsyncIterator
from contextlib import asynccontextmanager

from fastapi import FastAPI

from service import __version__
from service.api.answer_cache import AnswerCache
from service.api.deps import get_settings
from service.api.docs import install_docs
from service.api.operations import install_operations
from service.api.problems import install_problem_handlers
from service.api.routes import batch, compare, design, export, health, identify, simulate, sweep, workbench
from service.api.settings import Settings
from service.schemas.design import ADVISORY

__all__ = ["create_app"]

DESCRIPTION = f"""movecast designs and checks predictive controllers (MPC) for process plants:
post a linear plant model with weights and horizons, get the controller's gains, the Hessian's
conditioning and the closed-loop poles.

Every answer is a pure function of the request as sent. A request repeated byte for byte (same
route, body, query, `Accept` and `Content-Type`) is answered from the serving process's answer
cache with the same bytes; the `Cache-Status` response header (RFC 9211) says `movecast; hit`
or `movecast; fwd=miss; stored`. Send `Cache-Control: no-cache` to have it computed again,
`no-store` to have it computed and not kept. `/design/batch` is always computed.

**{ADVISORY}**
"""


def create_app(settings: Settings | None = None) -> FastAPI:
    """Build the app; ``settings`` defaults to the environment's."""
    chosen = settings or get_settings()

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        app.state.ready = True
        try:
            yield
        finally:
            app.state.ready = False

    app = FastAPI(
        title="movecast",
        version=__version__,
        description=DESCRIPTION,
        lifespan=lifespan,
        docs_url=None,
        redoc_url=None,
    )
    app.state.settings = chosen
    app.state.answer_cache = AnswerCache(chosen.answer_cache_bytes)
    app.state.ready = False
    install_problem_handlers(app)
    install_docs(app)
    app.include_router(design.router)
    app.include_router(sweep.router)
    app.include_router(export.router)
    app.include_router(compare.router)
    app.include_router(health.router)
    app.include_router(batch.router)
    app.include_router(simulate.router)
    app.include_router(identify.router)
    app.include_router(workbench.router)
    install_operations(app, chosen)  # last: it documents the routes included above
    return app
