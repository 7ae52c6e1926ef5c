"""The HTTP API: app factory with lifespan, schemas, routes, the edge middleware, metrics."""

from service.api.app import app_from_environment, create_app

__all__ = ["app_from_environment", "create_app"]
