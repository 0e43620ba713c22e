"""HTTP layer: FastAPI routers, schemas, keys and roles, problem details, health and metrics."""

from .app import create_app

__all__ = ["create_app"]
