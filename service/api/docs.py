"""GET /docs from assets of an installed package, never a public CDN.

Plant networks seldom reach the internet, so the interactive page loads its script, style
sheet and icon from ``/docs/assets/``, served from the ``swagger-ui-bundle`` package (PyPI,
Apache-2.0).  ``/docs/oauth2-redirect`` is FastAPI's inline page; ``/redoc``, whose renderer
only comes from a CDN, now sends the browser to ``/docs``.  All of these are open without an
API key, like the OpenAPI document itself (:data:`service.api.security.OPEN_PATHS`).
"""

from __future__ import annotations

from fastapi import FastAPI
from fastapi.openapi.docs import get_swagger_ui_html, get_swagger_ui_oauth2_redirect_html
from fastapi.responses import HTMLResponse, RedirectResponse
from starlette.staticfiles import StaticFiles
from swagger_ui_bundle import swagger_ui_path

__all__ = ["ASSETS", "install_docs"]

ASSETS = "/docs/assets"


def install_docs(app: FastAPI) -> None:
    """Mount the assets and add /docs, /docs/oauth2-redirect and /redoc (none in the schema)."""
    app.mount(ASSETS, StaticFiles(directory=str(swagger_ui_path)), name="docs-assets")

    @app.get("/docs", include_in_schema=False)
    async def docs() -> HTMLResponse:
        return get_swagger_ui_html(
            openapi_url=app.openapi_url or "/openapi.json",
            title=f"{app.title} - API",
            oauth2_redirect_url="/docs/oauth2-redirect",
            swagger_js_url=f"{ASSETS}/swagger-ui-bundle.js",
            swagger_css_url=f"{ASSETS}/swagger-ui.css",
            swagger_favicon_url=f"{ASSETS}/favicon-32x32.png",
        )

    @app.get("/docs/oauth2-redirect", include_in_schema=False)
    async def oauth2_redirect() -> HTMLResponse:
        return get_swagger_ui_oauth2_redirect_html()

    @app.get("/redoc", include_in_schema=False)
    async def redoc() -> RedirectResponse:
        return RedirectResponse("/docs")
