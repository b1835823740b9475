"""GET / and GET /workbench/...: the browser workbench, served by the API process itself.

The page and its own scripts live in ``service/web`` (plain HTML, CSS and JavaScript, no build
step); the charting library is plotly.js as shipped inside the pinned ``plotly`` package
(``plotly/package_data/plotly.min.js``), read from the installed package, so nothing is
fetched from the network at run time.  Every URL the page uses is relative, so it works at
the root and behind a reverse proxy that adds a path prefix.

These routes hold no data: they are open even with API keys configured (the page then asks
for a key and sends it with each API call); the API routes stay protected.  They are left out
of the OpenAPI document, which describes the API only.
"""

from __future__ import annotations

import gzip
import html
from functools import cache
from importlib import resources
from typing import Any

from fastapi import APIRouter, HTTPException, Request
from fastapi.responses import HTMLResponse, JSONResponse, Response

from service import __version__
from service.pipeline.examples import list_examples, load_example
from service.schemas.design import ADVISORY

__all__ = ["ANSWER_WAIT_MARGIN_SECONDS", "ASSETS", "PLOTLY_ASSET", "answer_wait_seconds", "router"]

router = APIRouter(include_in_schema=False)

#: The page's own files under /workbench/, with their media types.
ASSETS = {
    "workbench.css": "text/css; charset=utf-8",
    "workbench.js": "text/javascript; charset=utf-8",
    "editor.js": "text/javascript; charset=utf-8",
    "charts.js": "text/javascript; charset=utf-8",
    "tables.js": "text/javascript; charset=utf-8",
}
PLOTLY_ASSET = "vendor/plotly.min.js"
#: Which endpoint each bundled example is posted to, by file-name prefix.
_ENDPOINTS = (
    ("sweep_request", "design/sweep"),
    ("simulate_request", "simulate"),
    ("design_request", "design"),
    ("identify_request", "identify"),
)

#: Seconds the page waits for an answer beyond the service's compute limit (the limit counts the
#: queue and the computation; the margin is for the bodies' transfer and a proxy's hop).
ANSWER_WAIT_MARGIN_SECONDS = 5.0


def answer_wait_seconds(request_timeout_seconds: float) -> float:
    """How long the page waits for an answer before it gives up and says so, in seconds.

    The service answers every call within ``request_timeout_seconds`` (a 503 past it), so an
    answer that has not come after the margin more is not coming: a proxy in front of the
    service or the network holds it.  Without a deadline the page would say "Running..." for
    ever and keep its Run button disabled.
    """
    return request_timeout_seconds + ANSWER_WAIT_MARGIN_SECONDS


@cache
def _web_file(name: str) -> bytes:
    return resources.files("service.web").joinpath(name).read_bytes()


@cache
def _plotly() -> tuple[bytes, bytes]:
    """plotly.min.js from the installed ``plotly`` package, raw and gzip-compressed."""
    raw = resources.files("plotly").joinpath("package_data", "plotly.min.js").read_bytes()
    return raw, gzip.compress(raw, compresslevel=6, mtime=0)


def _accepts_gzip(request: Request) -> bool:
    codings = request.headers.get("accept-encoding", "")
    return any(part.split(";")[0].strip().lower() == "gzip" for part in codings.split(","))


@router.get("/")
def page(request: Request) -> HTMLResponse:
    """The workbench page."""
    settings = request.app.state.settings
    keys = bool(settings.api_key_values())
    text = (
        _web_file("index.html")
        .decode("utf-8")
        .replace("{{auth}}", "required" if keys else "none")
        .replace("{{answer_wait}}", f"{answer_wait_seconds(settings.request_timeout_seconds):g}")
        .replace("{{version}}", html.escape(__version__))
        .replace("{{advisory}}", html.escape(ADVISORY))
    )
    return HTMLResponse(text, headers={"Cache-Control": "no-cache"})


@router.get("/workbench/examples")
def examples() -> JSONResponse:
    """The bundled example requests the page offers, each with the endpoint it is posted to."""
    listed = []
    for name in list_examples():
        endpoint = next((e for prefix, e in _ENDPOINTS if name.startswith(prefix)), None)
        if endpoint is not None:
            listed.append({"name": name, "endpoint": endpoint})
    return JSONResponse(listed, headers={"Cache-Control": "no-cache"})


@router.get("/workbench/examples/{name}")
def example(name: str) -> JSONResponse:
    """One bundled example request."""
    if name not in list_examples():
        raise HTTPException(status_code=404, detail=f"no bundled example {name!r}")
    body: dict[str, Any] = load_example(name)
    return JSONResponse(body, headers={"Cache-Control": "no-cache"})


@router.get("/workbench/vendor/plotly.min.js")
def plotly_js(request: Request) -> Response:
    """plotly.js from the installed ``plotly`` package (gzip-compressed when accepted)."""
    raw, packed = _plotly()
    headers = {"Cache-Control": "public, max-age=86400", "Vary": "Accept-Encoding"}
    media = "text/javascript; charset=utf-8"
    if _accepts_gzip(request):
        return Response(packed, media_type=media, headers={**headers, "Content-Encoding": "gzip"})
    return Response(raw, media_type=media, headers=headers)


@router.get("/workbench/{name}")
def asset(name: str) -> Response:
    """One of the page's own files."""
    media = ASSETS.get(name)
    if media is None:
        raise HTTPException(status_code=404, detail=f"no workbench file {name!r}")
    return Response(_web_file(name), media_type=media, headers={"Cache-Control": "no-cache"})
