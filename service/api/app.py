"""The HTTP API: ``create_app(settings)`` builds a FastAPI app serving the bundles in settings.

Endpoints (all under ``/v1`` except metrics and the OpenAPI document):

- ``POST /v1/score``: probabilities, decisions and reason codes for a batch of events;
- ``POST /v1/score/timeline``: the same for one entity, from its raw logs;
- ``GET /v1/models`` and ``GET /v1/models/{name}``: what is served and each model's schema;
- ``GET /v1/health/live`` and ``GET /v1/health/ready``: for probes (never behind a key);
- ``POST /v1/admin/reload``: load the bundles again and swap them in (always behind a key);
- ``GET /metrics``: Prometheus text.
"""

from __future__ import annotations

import asyncio
import contextlib
import inspect
import signal
import threading
from collections.abc import AsyncIterator
from typing import Any

from fastapi import FastAPI
from starlette.concurrency import run_in_threadpool

from causeline.service.api import document, problems
from causeline.service.api.fastpath import FastPath
from causeline.service.api.limits import BodyLimitMiddleware
from causeline.service.api.metrics import MetricsMiddleware
from causeline.service.api.routers import admin, health, models, scoring
from causeline.service.api.settings import Settings
from causeline.service.api.state import Service


def create_app(settings: Settings | None = None) -> FastAPI:
    """Build the app; bundles load at startup (lifespan), so a bad bundle stops the server."""
    settings = settings or Settings.from_env()
    service = Service(settings)

    @contextlib.asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        await run_in_threadpool(service.reload)
        if service.log is not None:
            service.log.start()
        hup = _install_sighup(service)
        try:
            yield
        finally:
            if hup:
                asyncio.get_running_loop().remove_signal_handler(signal.SIGHUP)
            if service.log is not None:
                await run_in_threadpool(service.log.stop)

    app = FastAPI(
        title="causeline",
        version="1",
        summary="Event probabilities with exact reason codes",
        description=(
            "Scores are model estimates to support, not replace, the judgement of qualified "
            "staff; follow local codes and licensed practice where safety is involved."
        ),
        lifespan=lifespan,
        **telemetry(),
    )
    app.state.service = service
    document.install(app, service)
    app.router.redirect_slashes = False  # /v1/score/ gets a 404 problem, not an empty 307
    problems.install(app)
    # The routers' routes join the app's own list. FastAPI's include_router keeps an included
    # router nested and matches through it on every request: measured 4 % more time per
    # request (bench/compare.py). Each route already carries its router's tags and dependencies.
    for router in (scoring.router, models.router, health.router, admin.router):
        app.router.routes.extend(router.routes)
    app.add_middleware(BodyLimitMiddleware, max_bytes=settings.max_body_bytes)
    # The scoring route's requests go past the layers in between (see fastpath.py).
    app.add_middleware(FastPath, path=scoring.SCORE_PATH, endpoint=scoring.score,
                       route=_route(app, scoring.SCORE_PATH, "POST"),
                       max_bytes=settings.max_body_bytes, handlers=app.exception_handlers)
    app.add_middleware(MetricsMiddleware, metrics=service.metrics, routes=app.router.routes)
    return app


# OpenTelemetry's stand-ins until a provider is set up (its API has no public "is set up").
_PLACEHOLDERS = {"ProxyTracerProvider", "_ProxyMeterProvider", "ProxyLoggerProvider"}


def telemetry() -> dict[str, Any]:
    """FastAPI's own OpenTelemetry spans, metrics and logs: kept where a provider is set up
    when the app is made (say by ``opentelemetry-instrument``), switched off otherwise.

    FastAPI asks on every request whether a provider has been set up since, and that look-up
    (it reads the environment) cost 3-4 % of a scoring request measured in-process; the
    service's own metrics are Prometheus's, at ``/metrics``.
    """
    if "telemetry" not in inspect.signature(FastAPI).parameters:
        return {}  # a FastAPI without it
    try:
        from opentelemetry import metrics, trace
        from opentelemetry._logs import get_logger_provider
    except ImportError:
        return {}
    providers = (trace.get_tracer_provider(), metrics.get_meter_provider(),
                 get_logger_provider())
    if any(type(provider).__name__ not in _PLACEHOLDERS for provider in providers):
        return {}
    return {"telemetry": {"tracing": False, "metrics": False, "logs": False}}


def _route(app: FastAPI, path: str, method: str) -> Any:
    for route in app.router.routes:
        if getattr(route, "path", None) == path and method in getattr(route, "methods", ()):
            return route
    raise LookupError(f"no route {method} {path}")


def app_from_environment() -> FastAPI:
    """uvicorn's factory: settings from ``CAUSELINE_*`` variables."""
    return create_app(Settings.from_env())


def _install_sighup(service: Service) -> bool:
    """SIGHUP reloads the bundles, where signals can be handled (the main thread)."""
    if threading.current_thread() is not threading.main_thread():
        return False
    loop = asyncio.get_running_loop()

    async def reload() -> None:
        with contextlib.suppress(Exception):  # already logged, counted and in readiness
            await run_in_threadpool(service.reload)

    try:
        loop.add_signal_handler(signal.SIGHUP, lambda: loop.create_task(reload()))
    except (NotImplementedError, RuntimeError, ValueError):
        return False
    return True
