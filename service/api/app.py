"""The FastAPI application: routers, error handlers, metrics, start-up, and the OpenAPI document."""

from __future__ import annotations

import gc
import json
import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from importlib.resources import files
from typing import Any

from fastapi import FastAPI
from pydantic.json_schema import models_json_schema
from sqlalchemy.exc import SQLAlchemyError
from starlette.responses import Response
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.settings import Settings
from service.store import Database, secret_hash, upsert_key
from service.version import VERSION

from . import allocations, audit, errors, estimating, impact, mixes, operations, plans
from .auth import BOOTSTRAP_KEY_ID
from .docs import install_docs
from .errors import PROBLEM_MEDIA_TYPE, PayloadTooLarge, problem_response
from .gateway import REQUEST_ID_PATTERN, Gateway, csv_routes
from .metrics import Metrics, MetricsMiddleware
from .responses import DESCRIPTIONS
from .schemas import AllocationIn, BatchIn, EstimateIn, MixIn, Problem
from .state import AppState

log = logging.getLogger("mixline.api")
# Package data (pyproject's package-data), so an installed package, the image included, has them.
EXAMPLES = files("service.api") / "openapi_examples"


class BodyLimit:
    """Refuse a request body over `limit` bytes with 413, on every route.

    An oversized Content-Length is refused before a byte is read; otherwise the bytes actually
    received are counted (chunked bodies have no Content-Length), and once they pass the limit
    the application's reading stops and whatever it would have answered is replaced by the 413.
    """

    def __init__(self, app: ASGIApp, limit: int) -> None:
        self.app = app
        self.limit = limit

    def _refusal(self, size: str) -> Response:
        return problem_response(
            413, "Payload too large", f"request body of {size} is over the limit of {self.limit} bytes",
            slug="payload-too-large",
        )

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        for name, value in scope.get("headers", ()):
            if name == b"content-length" and value.isdigit() and int(value) > self.limit:
                await self._refusal(f"{int(value)} bytes")(scope, receive, send)
                return
        received = 0
        over = False
        started = False

        async def counted() -> Message:
            nonlocal received, over
            message = await receive()
            if message["type"] == "http.request":
                received += len(message.get("body", b""))
                if received > self.limit:
                    over = True
                    raise PayloadTooLarge(f"request body over the limit of {self.limit} bytes")
            return message

        async def guarded(message: Message) -> None:
            nonlocal started
            if over:
                return  # the application's own answer to the interrupted read is dropped
            started = started or message["type"] == "http.response.start"
            await send(message)

        try:
            await self.app(scope, counted, guarded)
        except PayloadTooLarge:
            if not over:
                raise
        if over and not started:
            await self._refusal("more bytes")(scope, receive, send)


def bootstrap(state: AppState) -> None:
    """Record the bootstrap operator key in the database. The key works without this row (auth.py
    knows it from the settings), so a database that is down at start-up delays only the row."""
    key = state.settings.bootstrap_operator_key
    if key:
        try:
            with state.db.writing() as s:
                upsert_key(s, key_id=BOOTSTRAP_KEY_ID, plan_id=None, role="operator", secret_hash=secret_hash(key))
        except SQLAlchemyError as error:
            log.warning("could not record the bootstrap operator key: %s", str(error).splitlines()[0][:200])


def create_app(settings: Settings | None = None, database: Database | None = None, *, migrate: bool = True) -> FastAPI:
    settings = settings or Settings()
    db = database or Database(
        settings.database_url, pool_size=settings.db_pool_size, max_overflow=settings.db_max_overflow
    )
    metrics = Metrics()
    metrics.watch_writer(db.writer)
    state = AppState(settings, db, metrics)

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        if migrate:
            db.upgrade()
        state.access_log.start()
        db.start()
        bootstrap(state)
        # Start-up objects (modules, routes, schemas) never die: keeping them out of the
        # collector's generations makes the collections that run between requests short.
        gc.collect()
        gc.freeze()
        try:
            yield
        finally:
            state.shutting_down = True
            state.batches.close()
            state.mixes.close()
            if database is None:
                db.close()
            state.access_log.close()

    app = FastAPI(
        title="mixline",
        version=VERSION,
        summary="Per-member risky/safe splits by mean-variance reasoning, every answer logged tamper-evidently.",
        description=(
            "Every recommendation follows from the plan's stated assumptions, which are estimates; it "
            "is not individual advice; local rules and licensed advice prevail."
        ),
        lifespan=lifespan,
        docs_url=None,  # served by docs.install_docs, from the service's own assets
        redoc_url=None,
        # The service's own metrics (Prometheus) and access log cover this; FastAPI's native
        # OpenTelemetry hooks looked up the global providers on every request (about 8 us of a
        # single allocation's ~400 us of CPU) to find them unconfigured.
        telemetry={"tracing": False, "metrics": False, "logs": False},
    )
    app.state.mixline = state
    app.state.metrics = metrics
    errors.install(app)
    app.include_router(allocations.posting)  # the busiest routes first: matched soonest
    routers = [module.router for module in (allocations, plans, estimating, mixes, impact, audit, operations)]
    for router in routers:
        app.include_router(router)
    app.include_router(audit.keys_router)
    app.add_middleware(MetricsMiddleware, metrics=metrics)
    app.add_middleware(BodyLimit, limit=settings.max_body_bytes)
    # The routers' own routes: the application keeps included routers as branches, not routes.
    csv_paths = csv_routes(route for router in routers for route in router.routes)
    app.add_middleware(Gateway, log=state.access_log, csv_paths=csv_paths)
    install_openapi(app)
    install_docs(app)
    return app


def _load_examples() -> dict[str, dict[str, Any]]:
    found: dict[str, dict[str, Any]] = {}
    for path in sorted((p for p in EXAMPLES.iterdir() if p.name.endswith(".json")), key=lambda p: p.name):
        example = json.loads(path.read_text())
        found.setdefault(example["operation_id"], example)
    return found


# What every answer, or every answer of a status, carries (declared on each response).
_REQUEST_ID_HEADER = {
    "description": "the caller's X-Request-ID (1 to 128 visible ASCII characters) or one the service made",
    "required": True,
    "schema": {"type": "string", "pattern": f"^{REQUEST_ID_PATTERN}$"},
}
_RETRY_AFTER = {"description": "seconds to wait before retrying", "schema": {"type": "string", "pattern": r"^[0-9]+$"}}
_STATUS_HEADERS: dict[str, dict[str, Any]] = {
    "401": {"WWW-Authenticate": {"description": "Bearer", "required": True, "schema": {"type": "string"}}},
    "409": {"Retry-After": {**_RETRY_AFTER, "description": "with an Idempotency-Key still being answered: seconds "
                                                          "to wait before retrying with it"}},
    "429": {"Retry-After": {**_RETRY_AFTER, "required": True}},
    "503": {"Retry-After": {**_RETRY_AFTER, "required": True}},
}
_REPLAY = {"Mixline-Replay": {
    "description": "true when this is the stored first answer to an earlier request with the same Idempotency-Key "
                   "and body (nothing new was logged)",
    "schema": {"type": "string", "enum": ["true"]},
}}
_OPERATION_HEADERS: dict[str, dict[str, dict[str, Any]]] = {
    "create_allocation": {"201": _REPLAY},
    "create_allocation_batch": {"201": _REPLAY},
    "review_mix": {"200": {"Content-Security-Policy": {
        "description": "default-src 'none' and what the page itself holds: it loads nothing",
        "required": True, "schema": {"type": "string"},
    }}},
}
_UNKEYED_PATHS = {"/livez", "/readyz", "/metrics"}


def _statuses(path: str, op: dict[str, Any]) -> list[str]:
    """Every status an operation can answer besides those its route declares."""
    statuses = ["500"]
    if op.get("security"):
        # the key is checked (401, 403, and 404 for another plan's), rate limited, read from the
        # database; any route answers 404 for a path it does not know and 422 for bad parameters
        statuses += ["401", "403", "404", "422", "429", "503"]
    elif path not in _UNKEYED_PATHS:
        statuses += ["404", "422", "503"]
    if "requestBody" in op:
        statuses += ["413", "415", "422"]
    return statuses


def install_openapi(app: FastAPI) -> None:
    """Post-process FastAPI's document so that it says exactly what the service answers: every
    status each operation can give, as problem+json; the headers of every answer; the request
    models of routes that read their own bodies; and our examples."""
    original = app.openapi
    settings: Settings = app.state.mixline.settings

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
        for path, path_item in doc.get("paths", {}).items():
            for op in path_item.values():
                if not isinstance(op, dict):
                    continue
                responses = op.setdefault("responses", {})
                for status in _statuses(path, op):
                    responses.setdefault(status, {})
                for status, response in responses.items():
                    if not status.isdigit():
                        continue
                    if int(status) >= 400:
                        response["description"] = DESCRIPTIONS[int(status)]
                        response["content"] = {
                            PROBLEM_MEDIA_TYPE: {"schema": {"$ref": "#/components/schemas/Problem"}}
                        }
                    headers = response.setdefault("headers", {})
                    headers["X-Request-ID"] = _REQUEST_ID_HEADER
                    if status != "409" or any(p["name"] == "Idempotency-Key" for p in op.get("parameters", [])):
                        headers.update(_STATUS_HEADERS.get(status, {}))
                    headers.update(_OPERATION_HEADERS.get(op.get("operationId", ""), {}).get(status, {}))
                for parameter in op.get("parameters", []):
                    if parameter["name"] == "points" and parameter["in"] == "query":
                        # the bound is a setting (MIXLINE_MAX_FRONTIER_POINTS): the document states this process's
                        parameter["schema"]["maximum"] = settings.max_frontier_points
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
            # a text answer (the review page): the media type the operation declares for it
            media_type = next((m for m in response.get("content", {}) if m != "application/json"), "text/plain")
        else:
            media_type = "application/json"
        content = response.setdefault("content", {}).setdefault(media_type, {})
        content["examples"] = {name: {"summary": example.get("summary", ""), "value": example["response"]}}
