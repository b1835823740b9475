"""Dependencies shared by the routers, as ``Annotated`` aliases."""

from __future__ import annotations

from functools import cache
from typing import Annotated

from fastapi import Depends

from service.api.settings import Settings
from service.pipeline.caps import Caps

__all__ = ["CapsDep", "SettingsDep", "get_caps", "get_settings"]


@cache
def get_settings() -> Settings:
    """The process's settings, read once from the environment; apps override this."""
    return Settings()


def get_caps(settings: Annotated[Settings, Depends(get_settings)]) -> Caps:
    """The size caps from the settings."""
    return settings.caps()


SettingsDep = Annotated[Settings, Depends(get_settings)]
CapsDep = Annotated[Caps, Depends(get_caps)]
