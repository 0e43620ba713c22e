"""Prometheus metrics: requests by route template, what the service logged, the log writer's work,
the process and the Python runtime, and the running version.

The log writer (store) knows nothing of Prometheus: it reports each group it wrote through a
callback, and its queue depth is read only when /metrics is scraped.
"""

from __future__ import annotations

import time
from typing import Any

from prometheus_client import (
    CollectorRegistry,
    Counter,
    Gauge,
    GCCollector,
    Histogram,
    Info,
    PlatformCollector,
    ProcessCollector,
    disable_created_metrics,
    generate_latest,
)
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service.store import ChainWriter
from service.version import VERSION

# A `_created` series per counter and histogram child made 12 % of all series, and nothing graphs
# them (a restart shows in process_start_time_seconds). This switch is process-wide.
disable_created_metrics()  # type: ignore[no-untyped-call]

# The media type of Prometheus' text exposition format, as /metrics answers and OpenAPI declares.
EXPOSITION_MEDIA_TYPE = "text/plain; version=0.0.4; charset=utf-8"

_SECONDS_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2.5, 5, 10, 30)
# One row (a lone allocation) up to a whole membership (300,000) in one transaction.
_ROWS_BUCKETS = (1, 2, 4, 8, 16, 32, 64, 128, 512, 2048, 8192, 32768, 131072, 524288)


class Metrics:
    def __init__(self) -> None:
        self.registry = CollectorRegistry()
        ProcessCollector(registry=self.registry)
        PlatformCollector(registry=self.registry)
        GCCollector(registry=self.registry)
        Info("mixline_build", "The running service's version", registry=self.registry).info(
            {"version": VERSION}
        )
        self.requests = Counter(
            "mixline_http_requests_total", "HTTP requests answered", ["method", "route", "status"],
            registry=self.registry,
        )
        self.latency = Histogram(
            "mixline_http_request_seconds", "Time to answer an HTTP request", ["method", "route"],
            buckets=_SECONDS_BUCKETS, registry=self.registry,
        )
        self.allocations = Counter(
            "mixline_allocations_logged_total", "Recommendations written to the audit log", ["plan_id"],
            registry=self.registry,
        )
        self.mixes = Counter(
            "mixline_mixes_published_total", "Risky-mix versions solved and stored", ["plan_id"],
            registry=self.registry,
        )
        self.log_queue = Gauge(
            "mixline_log_writer_queue_jobs", "Jobs waiting for the log writer (read at scrape time)",
            registry=self.registry,
        )
        self.log_commit = Histogram(
            "mixline_log_writer_commit_seconds",
            "Time the log writer took to write and commit one group of jobs",
            buckets=_SECONDS_BUCKETS, registry=self.registry,
        )
        self.log_group_rows = Histogram(
            "mixline_log_writer_group_rows", "Log rows written in one transaction (group commit)",
            buckets=_ROWS_BUCKETS, registry=self.registry,
        )

    def watch_writer(self, writer: ChainWriter) -> None:
        """Report ``writer``'s queue depth and the groups it writes from now on."""
        self.log_queue.set_function(writer.queue_depth)
        writer.group_written = self._group_written

    def _group_written(self, jobs: int, rows: int, seconds: float) -> None:
        self.log_commit.observe(seconds)
        self.log_group_rows.observe(rows)

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
