"""Endpoints called with their dependencies provided by hand give what FastAPI's resolver gives.

``service/api/direct.py`` calls ``POST /design`` with its settings, caps and budget provided
directly.  Checked here: the answers are the resolver's byte for byte, a dependency added
where the router is included still runs (a shortcut must never skip, say, a check of
access), and an override in ``app.dependency_overrides`` is honoured.
"""

from __future__ import annotations

from fastapi import APIRouter, BackgroundTasks, Depends, FastAPI, Header, HTTPException
from fastapi.responses import Response
from fastapi.testclient import TestClient

from service.api import deps
from service.api.bodies import CheckedBodyRoute
from service.api.deps import CapsDep
from service.api.direct import direct_call
from service.api.routes import design, simulate, sweep
from service.schemas.design import DesignRequest


def test_design_and_simulate_are_called_directly_and_a_plain_function_route_is_not():
    def route(router, path):
        (found,) = [r for r in router.routes if getattr(r, "path", None) == path]
        return found

    assert direct_call(route(design.router, "/design")) is not None
    assert direct_call(route(simulate.router, "/simulate")) is not None  # its Request is passed on
    # a plain function whose answer FastAPI serializes: the resolver serves it
    assert direct_call(route(sweep.router, "/design/sweep")) is None


def test_direct_answers_are_the_resolvers_byte_for_byte(make_client, example, monkeypatch):
    import fastapi.routing

    resolved_calls: list[int] = []
    resolve = fastapi.routing.solve_dependencies

    async def counted(*args, **kwargs):
        resolved_calls.append(1)
        return await resolve(*args, **kwargs)

    monkeypatch.setattr(fastapi.routing, "solve_dependencies", counted)
    from service.pipeline.examples import load_example

    client = make_client()
    calls = [
        ("/design", example, {}),
        ("/simulate", load_example("simulate_request.json"), {}),
        ("/simulate", load_example("simulate_request.json"), {"accept": "text/csv"}),
    ]
    fresh = {"cache-control": "no-store"}
    direct = [client.post(path, json=body, headers={**fresh, **headers}) for path, body, headers in calls]
    assert resolved_calls == []  # FastAPI's resolver did not run
    # Any override turns the direct call off for the app: the same requests through FastAPI's resolver.
    client.app.dependency_overrides[deps.get_settings] = deps.get_settings
    resolved = [client.post(path, json=body, headers={**fresh, **headers}) for path, body, headers in calls]
    client.app.dependency_overrides.clear()
    assert len(resolved_calls) == len(calls)
    for a, b in zip(direct, resolved, strict=True):
        assert a.status_code == b.status_code == 200
        assert a.headers["content-type"] == b.headers["content-type"]
        assert a.content == b.content
    assert direct[2].headers["content-type"].startswith("text/csv")


def test_a_dependency_of_the_inclusion_still_runs(make_client, example):
    calls: list[str] = []

    def refuse() -> None:
        calls.append("refused")
        raise HTTPException(status_code=418, detail="refused by the inclusion's dependency")

    client = make_client()
    app = FastAPI()
    app.state.settings = client.app.state.settings
    app.include_router(design.router, dependencies=[Depends(refuse)])
    with TestClient(app) as guarded:
        answer = guarded.post("/design", json=example)
    assert answer.status_code == 418 and calls == ["refused"]


def test_an_override_of_a_provided_dependency_is_honoured(make_client, example):
    import dataclasses

    client = make_client()
    tight = dataclasses.replace(client.app.state.settings.caps(), max_states=1)  # the example has 4 states
    client.app.dependency_overrides[deps.get_caps] = lambda: tight
    try:
        answer = client.post("/design", json=example, headers={"cache-control": "no-store"})
    finally:
        client.app.dependency_overrides.clear()
    assert answer.status_code == 422 and "/model" in answer.text


def test_an_endpoint_with_any_other_parameter_keeps_the_resolver():
    router = APIRouter(route_class=CheckedBodyRoute)

    @router.post("/only-known")
    async def only_known(request: DesignRequest, caps: CapsDep) -> Response:
        return Response(b"")

    @router.post("/with-background")
    async def with_background(request: DesignRequest, caps: CapsDep, later: BackgroundTasks) -> Response:
        return Response(b"")

    @router.post("/with-header")
    async def with_header(request: DesignRequest, accept: str | None = Header(default=None)) -> Response:
        return Response(b"")

    @router.post("/plain-function")
    def plain_function(request: DesignRequest, caps: CapsDep) -> Response:
        return Response(b"")

    @router.post("/returns-a-model")
    async def returns_a_model(request: DesignRequest) -> DesignRequest:
        return request

    direct = {route.path: direct_call(route) is not None for route in router.routes}
    assert direct == {
        "/only-known": True,
        "/with-background": False,
        "/with-header": False,
        "/plain-function": False,
        "/returns-a-model": False,
    }
