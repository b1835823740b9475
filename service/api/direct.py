"""An endpoint called with its dependencies provided by hand, for the routes whose needs are known.

FastAPI resolves an endpoint's dependencies on each request by walking its dependency tree:
for ``POST /design`` (the body, the caps, the settings behind them and the budget) that walk
took about as long as parsing and validating the small design's body.  A route whose
endpoint is a coroutine returning a :class:`~starlette.responses.Response`, and whose only
parameters are its JSON body (validated already by :class:`service.api.bodies.CheckedBodyRoute`),
the dependencies of :data:`PROVIDED` and perhaps the request itself, is called here
directly: the app's settings, their caps and a fresh budget are what FastAPI would have
given it.

Any other route (a header, a query parameter, another dependency) keeps FastAPI's resolver,
and so does every route while ``app.dependency_overrides`` holds anything.
"""

from __future__ import annotations

import asyncio
import typing
from collections.abc import Awaitable, Callable
from contextlib import AsyncExitStack, asynccontextmanager
from typing import Any

from fastapi import routing as fastapi_routing
from fastapi.routing import APIRoute
from pydantic import BaseModel
from starlette.requests import Request
from starlette.responses import Response

from service.api.compute import get_budget
from service.api.deps import app_settings, get_caps
from service.api.settings import Settings

__all__ = ["PROVIDED", "DirectCall", "direct_call"]

#: Calls an endpoint from its request and its validated body.
DirectCall = Callable[[Request, BaseModel], Awaitable[Response]]
#: What a provider gives: from the request, the app's settings and the request's exit stack.
Provider = Callable[[Request, Settings, AsyncExitStack], Awaitable[Any]]


async def _settings(request: Request, settings: Settings, stack: AsyncExitStack) -> Settings:
    return settings


async def _caps(request: Request, settings: Settings, stack: AsyncExitStack) -> Any:
    return settings.caps()


async def _budget(request: Request, settings: Settings, stack: AsyncExitStack) -> Any:
    # get_budget itself, entered as FastAPI enters a dependency with yield
    return await stack.enter_async_context(asynccontextmanager(get_budget)(settings, request))


#: The dependencies provided by hand, by the function FastAPI would call.
PROVIDED: dict[Callable[..., Any], Provider] = {app_settings: _settings, get_caps: _caps, get_budget: _budget}


def _returns_response(endpoint: Callable[..., Any]) -> bool:
    try:
        returned = typing.get_type_hints(endpoint).get("return")
    except (NameError, TypeError):
        return False
    return isinstance(returned, type) and issubclass(returned, Response)


def _dependant(route: APIRoute) -> Any:
    """The dependencies FastAPI resolves for ``route`` where it is being included.

    In the FastAPI this project runs on (0.165) an included route keeps its own ``dependant``
    and builds its handler once per inclusion, with the inclusion's dependencies added, while
    a context variable names that inclusion (read here as FastAPI's own ``get_route_handler``
    reads it).  Where that variable does not exist, ``include_router`` is taken to have made a
    new route with every dependency in its ``dependant``, as older releases did.
    ``tests/api/test_direct_call.py`` checks that a dependency of the inclusion still runs.
    """
    context_var = getattr(fastapi_routing, "_effective_route_context_var", None)
    context = context_var.get() if context_var is not None else None
    if context is not None and getattr(context, "original_route", None) is route:
        return context.dependant
    return route.dependant


def direct_call(route: APIRoute) -> DirectCall | None:
    """The direct call of ``route``'s endpoint, or None when FastAPI's resolver must serve it.

    Called while FastAPI builds the route's handler (``get_route_handler``).
    """
    dependant = _dependant(route)
    if dependant is None:
        return None
    special = (
        "websocket_param_name",
        "http_connection_param_name",
        "response_param_name",
        "background_tasks_param_name",
        "security_scopes_param_name",
    )
    if (
        dependant.path_params
        or dependant.query_params
        or dependant.header_params
        or dependant.cookie_params
        or len(dependant.body_params) != 1
        or any(getattr(dependant, name, None) for name in special)  # a name older releases lack is absent
        or not asyncio.iscoroutinefunction(route.endpoint)
        or not _returns_response(route.endpoint)
    ):
        return None
    providers: list[tuple[str, Provider]] = []
    for dependency in dependant.dependencies:
        provide = PROVIDED.get(dependency.call) if dependency.call is not None else None
        if provide is None or dependency.name is None:
            return None
        providers.append((dependency.name, provide))
    body = dependant.body_params[0].name
    request_name = dependant.request_param_name  # the endpoint's own Request parameter, if any
    endpoint = route.endpoint

    async def call(request: Request, model: BaseModel) -> Response:
        settings: Settings = request.app.state.settings
        async with AsyncExitStack() as stack:
            values: dict[str, Any] = {body: model}
            if request_name is not None:
                values[request_name] = request
            for name, provide in providers:
                values[name] = await provide(request, settings, stack)
            answer: Response = await endpoint(**values)
            return answer

    return call
