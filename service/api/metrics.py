"""Prometheus metrics for one app instance (its own registry, so tests can build many apps).

With several uvicorn workers each process counts on its own; scrape one process per container
(``--workers 1`` and more replicas) for totals that add up.
"""

from __future__ import annotations

import collections
import time
from collections.abc import Awaitable, Callable, MutableMapping, Sequence
from typing import Any

from prometheus_client import (
    CONTENT_TYPE_LATEST,
    CollectorRegistry,
    Counter,
    Gauge,
    Histogram,
    disable_created_metrics,
    generate_latest,
)
from starlette.routing import Match

# The *_created series double the output and no dashboard here uses them.
disable_created_metrics()

Scope = MutableMapping[str, Any]
Message = MutableMapping[str, Any]
ASGIApp = Callable[[Scope, Callable[[], Awaitable[Message]], Callable[[Message], Awaitable[None]]],
                   Awaitable[None]]

# The recent-events gauges cover about this many of each model's latest scored events.
RECENT_EVENTS = 1000

# Milliseconds matter for a scoring call; the buckets stretch to a few seconds for big batches.
LATENCY_BUCKETS = (0.001, 0.0025, 0.005, 0.0075, 0.01, 0.015, 0.02, 0.03, 0.05, 0.075, 0.1,
                   0.25, 0.5, 1.0, 2.5, 5.0)


class Metrics:
    """Every metric the service exports."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        r = self.registry
        self.requests = Counter(
            "causeline_http_requests", "HTTP requests by route and status", ["route", "status"],
            registry=r,
        )
        self.latency = Histogram(
            "causeline_http_request_seconds", "Time to answer an HTTP request", ["route"],
            buckets=LATENCY_BUCKETS, registry=r,
        )
        self.events = Counter(
            "causeline_events_scored", "Events scored", ["model"], registry=r
        )
        self.reasons = Counter(
            "causeline_reason_codes_issued", "Reason codes returned, by code", ["model", "code"],
            registry=r,
        )
        self.batch_rows = Histogram(
            "causeline_explain_batch_rows",
            "Events per explanation call (concurrent requests share a call)",
            buckets=(1, 2, 4, 8, 16, 32, 64, 128, 256, 1024), registry=r,
        )
        self.bundle_failures = Counter(
            "causeline_bundle_load_failures", "Bundle loads or reloads refused", registry=r
        )
        self.reloads = Counter(
            "causeline_bundle_reloads", "Successful bundle swaps", registry=r
        )
        self.model_info = Gauge(
            "causeline_model_info", "Models served (value 1), by name and version",
            ["model", "version"], registry=r,
        )
        self.log_errors = Counter(
            "causeline_prediction_log_errors", "Prediction-log writes that failed", registry=r
        )
        self.log_dropped = Counter(
            "causeline_prediction_log_dropped_records",
            "Scored events not logged: queue full or write failed", ["reason"], registry=r,
        )
        self.log_written = Counter(
            "causeline_prediction_log_records", "Scored events written to the log", registry=r
        )
        self._reason_series: dict[tuple[str, str], Any] = {}
        self._events_series: dict[str, Any] = {}
        self.log_queue = Gauge(
            "causeline_prediction_log_queue_records", "Records waiting to be written", registry=r
        )
        self.recent_share = Gauge(
            "causeline_recent_reason_code_share",
            f"Share of the latest ~{RECENT_EVENTS} scored events carrying each reason code",
            ["model", "code"], registry=r,
        )
        self.recent_probability = Gauge(
            "causeline_recent_mean_probability",
            f"Mean calibrated probability of the latest ~{RECENT_EVENTS} scored events",
            ["model"], registry=r,
        )
        self.recent_events = Gauge(
            "causeline_recent_events", "Scored events the recent-events gauges cover", ["model"],
            registry=r,
        )
        self._recent: dict[str, Recent] = {}

    def count_scored(self, model: str, events: int, codes: list[str],
                     probability: float = 0.0) -> None:
        """Events scored by ``model``, the reason codes they were given and the sum of their
        probabilities (for the recent-events gauges, brought up to date when scraped)."""
        scored = self._events_series.get(model)
        if scored is None:
            scored = self._events_series[model] = self.events.labels(model)
        scored.inc(events)
        counts = collections.Counter(codes)
        recent = self._recent.get(model)
        if recent is None:
            recent = self._recent[model] = Recent(RECENT_EVENTS)
        recent.add(events, probability, counts)
        for code, times in counts.items():
            series = self._reason_series.get((model, code))
            if series is None:  # labels() locks and builds a key: once per model and code
                series = self._reason_series[(model, code)] = self.reasons.labels(model, code)
            series.inc(times)

    def set_models(self, models: dict[str, str]) -> None:
        """Replace the served-models gauge with ``{name: version}``."""
        self.model_info.clear()
        for name, version in models.items():
            self.model_info.labels(name, version).set(1)

    def exposition(self) -> tuple[bytes, str]:
        for model, recent in list(self._recent.items()):
            events = recent.events
            self.recent_events.labels(model).set(events)
            self.recent_probability.labels(model).set(recent.probability / max(events, 1))
            for code, count in list(recent.codes.items()):
                self.recent_share.labels(model, code).set(count / max(events, 1))
        return generate_latest(self.registry), CONTENT_TYPE_LATEST


class Recent:
    """A sliding window over the latest scored events, kept per batch: a batch costs one append
    and a counter update, and whole batches leave once ``size`` later events have come.
    An event carries a code at most once, so code counts are events with the code."""

    def __init__(self, size: int) -> None:
        self.size = size
        self.batches: collections.deque[tuple[int, float, collections.Counter[str]]] = (
            collections.deque())
        self.events = 0
        self.probability = 0.0
        self.codes: collections.Counter[str] = collections.Counter()

    def add(self, events: int, probability: float, codes: collections.Counter[str]) -> None:
        self.batches.append((events, probability, codes))
        self.events += events
        self.probability += probability
        self.codes.update(codes)
        while self.batches and self.events - self.batches[0][0] >= self.size:
            old_events, old_probability, old_codes = self.batches.popleft()
            self.events -= old_events
            self.probability -= old_probability
            self.codes.subtract(old_codes)


class MetricsMiddleware:
    """Counts requests by route template (never the raw path, which would explode labels)."""

    def __init__(self, app: ASGIApp, metrics: Metrics, routes: Sequence[Any] = ()) -> None:
        self.app = app
        self.metrics = metrics
        self._routes = routes  # to name the route of a request answered before routing
        self._cache: dict[tuple[str, int], tuple[Any, Any]] = {}

    async def __call__(self, scope: Scope, receive: Any, send: Any) -> None:
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
            route = getattr(scope.get("route"), "path", None) or self._template(scope)
            count, latency = self._series(route, status)
            count.inc()
            latency.observe(time.perf_counter() - started)

    def _template(self, scope: Scope) -> str:
        """The route a request was for when it was answered before routing (say a 413)."""
        for route in self._routes:
            match, child = route.matches(scope)
            if match != Match.NONE:
                return getattr(child.get("route", route), "path", None) or "unmatched"
        return "unmatched"

    def _series(self, route: str, status: int) -> tuple[Any, Any]:
        """The request counter and latency histogram of one route and status, looked up once.

        ``labels()`` takes a lock and builds its key on every call; routes are templates and
        statuses few, so the cache stays small.
        """
        key = (route, status)
        series = self._cache.get(key)
        if series is None:
            series = (self.metrics.requests.labels(route, str(status)),
                      self.metrics.latency.labels(route))
            self._cache[key] = series
        return series
