"""Prometheus metrics (prometheus_client) and the ASGI middleware that records them.

With several workers the server runs prometheus_client's multiprocess mode: `hunchwise
serve` points PROMETHEUS_MULTIPROC_DIR at a fresh folder before any worker starts, every
worker writes its samples to memory-mapped files there, and /metrics on any worker sums
them all. Without that variable (one process, tests) each app keeps its own registry.
"""

from __future__ import annotations

import functools
import os
import time
from typing import Any

from prometheus_client import (
    CONTENT_TYPE_LATEST,
    CollectorRegistry,
    Counter,
    Histogram,
    disable_created_metrics,
    generate_latest,
)
from prometheus_client.multiprocess import MultiProcessCollector
from starlette.types import ASGIApp, Message, Receive, Scope, Send

MULTIPROC_ENV = "PROMETHEUS_MULTIPROC_DIR"
# prometheus_client picks in-memory or file-backed values when it is imported; decide how to
# render from the same moment, not from the environment at render time.
MULTIPROCESS = bool(os.environ.get(MULTIPROC_ENV))
# The *_created series double the output and mean nothing in multiprocess mode.
disable_created_metrics()
# Latency buckets in seconds, dense where a loopback rank request lands (about 1-50 ms).
BUCKETS = (
    0.001,
    0.0025,
    0.005,
    0.0075,
    0.01,
    0.015,
    0.02,
    0.03,
    0.05,
    0.075,
    0.1,
    0.25,
    0.5,
    1.0,
    2.5,
    5.0,
    10.0,
)


class Metrics:
    """The service's counters and histograms, in a registry of their own."""

    content_type = CONTENT_TYPE_LATEST

    def __init__(self) -> None:
        self.registry = CollectorRegistry()
        counter = functools.partial(Counter, registry=self.registry)
        self.requests = counter(
            "hunchwise_http_requests",
            "HTTP requests answered, by endpoint, method and status",
            ["endpoint", "method", "status"],
        )
        self.latency = Histogram(
            "hunchwise_http_request_duration_seconds",
            "Time to answer a request, by endpoint",
            ["endpoint", "method"],
            buckets=BUCKETS,
            registry=self.registry,
        )
        self.clues = counter(
            "hunchwise_clues_ranked", "Clues ranked (batch requests count each clue)", ["ranked_by"]
        )
        self.log_failures = counter(
            "hunchwise_served_log_write_failures",
            "Appends to the served log that failed (the reply was served all the same)",
        )
        self.decisions = counter("hunchwise_decisions", "Decisions returned, by action", ["action"])
        self.reloads = counter(
            "hunchwise_reloads",
            "Index/model swaps in this worker, by cause and outcome",
            ["cause", "outcome"],
        )

        # Labelled children by (metric, label values): `labels()` checks and joins the values
        # and takes a lock on every call; the children it returns live as long as the metric.
        self._children: dict[tuple[int, tuple[str, ...]], Any] = {}

    def child(self, metric: Counter | Histogram, *values: str) -> Any:
        """`metric.labels(*values)`, looked up once per label set."""
        key = (id(metric), values)
        found = self._children.get(key)
        if found is None:
            found = self._children[key] = metric.labels(*values)
        return found

    @staticmethod
    def multiprocess() -> bool:
        """True when samples are shared between worker processes through files."""
        return MULTIPROCESS

    def render(self) -> bytes:
        """The text exposition format, summed over all workers in multiprocess mode."""
        if self.multiprocess():
            registry = CollectorRegistry()
            MultiProcessCollector(registry)
            return bytes(generate_latest(registry))
        return bytes(generate_latest(self.registry))


class MetricsMiddleware:
    """Counts every HTTP request and times it, labelled by route template (not raw path)."""

    def __init__(self, app: ASGIApp, metrics: Metrics) -> None:
        self.app = app
        self.metrics = metrics

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        status = 500

        async def send_wrapper(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = int(message["status"])
            await send(message)

        try:
            await self.app(scope, receive, send_wrapper)
        finally:
            endpoint = _endpoint(scope)
            method = str(scope.get("method", ""))
            metrics = self.metrics
            metrics.child(metrics.requests, endpoint, method, str(status)).inc()
            metrics.child(metrics.latency, endpoint, method).observe(time.perf_counter() - started)


def _endpoint(scope: Scope) -> str:
    # Route templates keep the label set small; unmatched paths share one label so
    # a client probing random URLs cannot grow the metrics without bound.
    route = scope.get("route")
    path = getattr(route, "path", None)
    return str(path) if path else "unmatched"
