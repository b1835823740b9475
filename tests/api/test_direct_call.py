"""Endpoints called with their dependencies provided by hand give what FastAPI's resolver gives.

``service/api/direct.py`` calls ``POST /design`` with its settings, caps and budget provided
directly.  Checked here: the answers are the resolver's byte for byte, a dependency added
where the router is included still runs (a shortcut must never skip, say, a check of
access), and an override in ``app.dependency_overrides`` is honoured.
"""

from __future__ import annotations

from fastapi import Depends, FastAPI, HTTPException
from fastapi.testclient import TestClient

from service.api import deps
from service.api.direct import direct_call
from service.api.routes import design, simulate


def test_the_design_route_is_called_directly_and_a_route_with_a_header_is_not():
    (design_route,) = [r for r in design.router.routes if getattr(r, "path", None) == "/design"]
    (simulate_route,) = [r for r in simulate.router.routes if getattr(r, "path", None) == "/simulate"]
    assert direct_call(design_route) is not None
    assert direct_call(simulate_route) is None  # it reads the Accept header: FastAPI resolves it


def test_direct_answers_are_the_resolvers_byte_for_byte(make_client, example, monkeypatch):
    import fastapi.routing

    resolved_calls: list[int] = []
    resolve = fastapi.routing.solve_dependencies

    async def counted(*args, **kwargs):
        resolved_calls.append(1)
        return await resolve(*args, **kwargs)

    monkeypatch.setattr(fastapi.routing, "solve_dependencies", counted)
    client = make_client()
    direct = client.post("/design", json=example, headers={"cache-control": "no-store"})
    assert resolved_calls == []  # FastAPI's resolver did not run
    # Any override turns the direct call off for the app: the same request through FastAPI's resolver.
    client.app.dependency_overrides[deps.get_settings] = deps.get_settings
    resolved = client.post("/design", json=example, headers={"cache-control": "no-store"})
    client.app.dependency_overrides.clear()
    assert resolved_calls
    assert direct.status_code == resolved.status_code == 200
    assert direct.content == resolved.content


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
