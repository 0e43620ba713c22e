"""Prometheus metrics: request counts and latencies by route template, and what the service logged."""

from __future__ import annotations

import time
from typing import Any

from prometheus_client import CollectorRegistry, Counter, Histogram, generate_latest
from starlette.types import ASGIApp, Message, Receive, Scope, Send


class Metrics:
    def __init__(self) -> None:
        self.registry = CollectorRegistry()
        self.requests = Counter(
            "mixline_http_requests_total", "HTTP requests answered", ["method", "route", "status"],
            registry=self.registry,
        )
        self.latency = Histogram(
            "mixline_http_request_seconds", "Time to answer an HTTP request", ["method", "route"],
            buckets=(0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30),
            registry=self.registry,
        )
        self.allocations = Counter(
            "mixline_allocations_logged_total", "Recommendations written to the audit log", ["plan_id"],
            registry=self.registry,
        )
        self.mixes = Counter(
            "mixline_mixes_published_total", "Risky-mix versions solved and stored", registry=self.registry,
        )

    def render(self) -> bytes:
        return generate_latest(self.registry)


class MetricsMiddleware:
    """Plain ASGI (no BaseHTTPMiddleware): it adds microseconds, not a task per request."""

    def __init__(self, app: ASGIApp, metrics: Metrics) -> None:
        self.app = app
        self.metrics = metrics
        self._children: dict[tuple[str, str, int], tuple[Any, Any]] = {}

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        start = time.perf_counter()
        status = 500

        async def record(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = message["status"]
            await send(message)

        try:
            await self.app(scope, receive, record)
        finally:
            route: Any = scope.get("route")
            key = (scope.get("method", ""), getattr(route, "path", "unmatched"), status)
            children = self._children.get(key)
            if children is None:
                # labels() takes a lock and builds a key each time; the children never change.
                method, template, code = key
                children = self._children[key] = (
                    self.metrics.requests.labels(method, template, str(code)),
                    self.metrics.latency.labels(method, template),
                )
            children[0].inc()
            children[1].observe(time.perf_counter() - start)
