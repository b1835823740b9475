"""HTTP layer: routers, dependencies, settings and the problem-details handlers."""

from service.api.app import create_app
from service.api.settings import Settings

__all__ = ["Settings", "create_app"]
