"""Dependencies shared by the routers, as ``Annotated`` aliases."""

from __future__ import annotations

from functools import cache
from typing import Annotated

from fastapi import Depends, Request

from service.api.settings import Settings
from service.pipeline.caps import Caps

__all__ = ["CapsDep", "SettingsDep", "app_settings", "get_caps", "get_settings"]


@cache
def get_settings() -> Settings:
    """The process's settings, read once from the environment (an app may be given others)."""
    return Settings()


async def app_settings(request: Request) -> Settings:
    """The settings of the app serving this request (``app.state.settings``, set by create_app).

    Read from the app's state rather than through ``dependency_overrides``: with any override
    in place FastAPI analyses every dependency's signature again on each request.  A coroutine,
    like :func:`get_caps`, because FastAPI runs every plain function dependency in a worker
    thread: a trip there and back per dependency for an attribute read.
    """
    settings: Settings = request.app.state.settings
    return settings


async def get_caps(settings: Annotated[Settings, Depends(app_settings)]) -> Caps:
    """The size caps from the settings (a few microseconds: on the event loop)."""
    return settings.caps()


SettingsDep = Annotated[Settings, Depends(app_settings)]
CapsDep = Annotated[Caps, Depends(get_caps)]
