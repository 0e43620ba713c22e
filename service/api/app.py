"""The FastAPI application: routers, error handlers, metrics, start-up, and the OpenAPI document."""

from __future__ import annotations

import gc
import json
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from pathlib import Path
from typing import Any

from fastapi import FastAPI
from pydantic.json_schema import models_json_schema
from starlette.types import ASGIApp, Receive, Scope, Send

from service.settings import Settings
from service.store import Database, secret_hash, upsert_key

from . import allocations, audit, batch, errors, estimating, mixes, operations, plans
from .auth import BOOTSTRAP_KEY_ID
from .errors import PROBLEM_MEDIA_TYPE, problem_response
from .fastpath import AllocationFastPath
from .metrics import Metrics, MetricsMiddleware
from .schemas import AllocationIn, BatchIn, EstimateIn, MixIn, Problem
from .state import AppState

EXAMPLES_DIR = Path(__file__).resolve().parents[2] / "openapi_examples"


class BodyLimit:
    """Refuse an oversized body from its Content-Length before reading a byte of it."""

    def __init__(self, app: ASGIApp, limit: int) -> None:
        self.app = app
        self.limit = limit

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] == "http":
            for name, value in scope.get("headers", ()):
                if name == b"content-length" and value.isdigit() and int(value) > self.limit:
                    response = problem_response(
                        413, "Payload too large",
                        f"request body of {int(value)} bytes is over the limit of {self.limit}",
                        slug="payload-too-large",
                    )
                    await response(scope, receive, send)
                    return
        await self.app(scope, receive, send)


def bootstrap(state: AppState) -> None:
    key = state.settings.bootstrap_operator_key
    if key:
        with state.db.writing() as s:
            upsert_key(s, key_id=BOOTSTRAP_KEY_ID, plan_id=None, role="operator", secret_hash=secret_hash(key))


def create_app(settings: Settings | None = None, database: Database | None = None, *, migrate: bool = True) -> FastAPI:
    settings = settings or Settings()
    db = database or Database(settings.database_url)
    metrics = Metrics()
    state = AppState(settings, db, metrics)

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        if migrate:
            db.upgrade()
        db.start()
        bootstrap(state)
        # Start-up objects (modules, routes, schemas) never die: keeping them out of the
        # collector's generations makes the collections that run between requests short.
        gc.collect()
        gc.freeze()
        try:
            yield
        finally:
            state.mixes.close()
            if database is None:
                db.close()

    app = FastAPI(
        title="mixline",
        version="1.0.0",
        summary="Per-member risky/safe splits by mean-variance reasoning, every answer logged tamper-evidently.",
        description=(
            "Every recommendation follows from the plan's stated assumptions, which are estimates; it "
            "is not individual advice; local rules and licensed advice prevail."
        ),
        lifespan=lifespan,
    )
    app.state.mixline = state
    app.state.metrics = metrics
    errors.install(app)
    for module in (plans, estimating, mixes, batch, allocations, audit, operations):
        app.include_router(module.router)
    documented = next(r for r in allocations.router.routes if getattr(r, "name", "") == "create_allocation")
    app.add_middleware(AllocationFastPath, state=state, route=documented, body_limit=settings.max_body_bytes)
    app.add_middleware(MetricsMiddleware, metrics=metrics)
    app.add_middleware(BodyLimit, limit=settings.max_body_bytes)
    install_openapi(app)
    return app


def _load_examples() -> dict[str, dict[str, Any]]:
    found: dict[str, dict[str, Any]] = {}
    if not EXAMPLES_DIR.is_dir():
        return found
    for path in sorted(EXAMPLES_DIR.glob("*.json")):
        example = json.loads(path.read_text())
        found.setdefault(example["operation_id"], example)
    return found


def install_openapi(app: FastAPI) -> None:
    """Post-process FastAPI's document: every error is problem+json, and our examples are embedded."""
    original = app.openapi

    def openapi() -> dict[str, Any]:
        if app.openapi_schema:
            return app.openapi_schema
        doc = original()
        components = doc.setdefault("components", {}).setdefault("schemas", {})
        # Models of the bodies that hot routes read themselves (see bodies.py), and the problem shape.
        _, defs = models_json_schema(
            [(Problem, "validation"), (AllocationIn, "validation"), (BatchIn, "validation"), (MixIn, "validation"),
             (EstimateIn, "validation")],
            ref_template="#/components/schemas/{model}",
        )
        for name, schema in defs.get("$defs", {}).items():
            components.setdefault(name, schema)
        for name in ("HTTPValidationError", "ValidationError"):
            components.pop(name, None)
        examples = _load_examples()
        for path_item in doc.get("paths", {}).values():
            for op in path_item.values():
                if not isinstance(op, dict):
                    continue
                responses = op.setdefault("responses", {})
                for status, response in responses.items():
                    if status.isdigit() and int(status) >= 400:
                        response["content"] = {
                            PROBLEM_MEDIA_TYPE: {"schema": {"$ref": "#/components/schemas/Problem"}}
                        }
                example = examples.get(op.get("operationId", ""))
                if example:
                    _embed(op, example)
        app.openapi_schema = doc
        return doc

    app.openapi = openapi  # type: ignore[method-assign]


def _embed(op: dict[str, Any], example: dict[str, Any]) -> None:
    """An example file: {"operation_id", "summary", "request", "status", "response", ...}."""
    name = "example"
    request = example.get("request")
    if request is not None and "requestBody" in op:
        media = op["requestBody"]["content"].setdefault("application/json", {})
        media["examples"] = {name: {"summary": example.get("summary", ""), "value": request}}
    status = str(example.get("status", 200))
    response = op["responses"].get(status)
    if response is not None and example.get("response") is not None:
        if int(status) >= 400:
            media_type = PROBLEM_MEDIA_TYPE
        elif isinstance(example["response"], str):
            media_type = "text/plain"
        else:
            media_type = "application/json"
        content = response.setdefault("content", {}).setdefault(media_type, {})
        content["examples"] = {name: {"summary": example.get("summary", ""), "value": example["response"]}}
