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
import logging
import signal
import threading
from collections.abc import AsyncIterator, Sequence
from dataclasses import dataclass
from typing import Annotated, Any

from fastapi import Depends, FastAPI, Request, Security
from fastapi.responses import JSONResponse, Response
from fastapi.security import HTTPAuthorizationCredentials
from starlette.concurrency import run_in_threadpool

from causeline.service.api import problems
from causeline.service.api.auth import ApiKeys, api_key_header, bearer, presented_keys
from causeline.service.api.batcher import Batcher, Job, Scored, log_records
from causeline.service.api.bodies import (
    CodeOut,
    FeatureOut,
    FieldsOut,
    FixOut,
    Liveness,
    LogStatus,
    ModelDescription,
    ModelList,
    ModelRef,
    ModelSummary,
    Readiness,
    ReloadOut,
    ReloadResult,
    ScoreRequest,
    ScoreResponse,
    TimelineScoreRequest,
)
from causeline.service.api.jsonio import FastJSONResponse
from causeline.service.api.limits import BodyLimitMiddleware
from causeline.service.api.logwriter import BackgroundLog
from causeline.service.api.metrics import Metrics, MetricsMiddleware
from causeline.service.api.problems import FieldError, Problem
from causeline.service.api.reading import all_contributions, openapi_request, read_body
from causeline.service.api.registry import Model, Registry, Served
from causeline.service.api.schema import EventSchema
from causeline.service.api.settings import Settings
from causeline.service.api.timeline import online_event
from causeline.service.errors import CauselineError, quoted

logger = logging.getLogger("causeline.service")


@dataclass(frozen=True)
class Current:
    """What a request reads once and keeps: the served models and their event schemas."""

    served: Served
    schemas: dict[str, EventSchema]

    def pick(self, name: str | None) -> tuple[Model, EventSchema]:
        if name is None:
            name = self.served.default
            if name is None:
                raise _invalid([FieldError(field="model", message=f"name a model: {self._names}")])
        if name not in self.served.models:
            raise _invalid([FieldError(
                field="model", message=f"no model named {quoted(name)}; served: {self._names}")])
        return self.served.models[name], self.schemas[name]

    @property
    def _names(self) -> str:
        return ", ".join(sorted(self.served.models))


class Service:
    """The app's state: settings, keys, metrics, registry, prediction log and batcher."""

    def __init__(self, settings: Settings) -> None:
        self.settings = settings
        self.keys = ApiKeys.load(
            settings.api_keys, settings.api_keys_file, settings.admin_without_keys
        )
        self.metrics = Metrics()
        self.registry = Registry(settings.bundle, settings.default_model)
        self.batcher = Batcher(settings.batch_rows, self.metrics.batch_rows.observe,
                               self.record_scored)
        folder = settings.prediction_log_folder
        self.log = None if folder is None else BackgroundLog(
            folder, self.metrics, settings.prediction_log_queue,
            settings.prediction_log_fsync_seconds,
        )
        self.current: Current | None = None

    def reload(self) -> tuple[Served | None, Served]:
        """Load every bundle off to the side and swap; raises (old set kept) on failure."""
        previous = self.current.served if self.current else None
        try:
            served = self.registry.reload()
        except Exception as exc:
            self.metrics.bundle_failures.inc()
            logger.error("bundle load refused: %s", self.registry.status.error,
                         exc_info=not isinstance(exc, CauselineError))
            raise
        reject = self.settings.unknown_fields == "reject"
        schemas = {name: EventSchema(m.bundle, reject) for name, m in served.models.items()}
        self.current = Current(served, schemas)  # the atomic swap: one reference
        self.metrics.set_models(served.versions())
        if previous is not None:
            self.metrics.reloads.inc()
        logger.info("serving %s", ", ".join(f"{n} {v}" for n, v in served.versions().items()))
        return previous, served

    def record_scored(self, model: Model, jobs: Sequence[Job], outcomes: Sequence[Scored]) -> None:
        """Count and log one explained batch's events; refused requests are neither."""
        events: list[Any] = []
        results: list[dict[str, Any]] = []
        for job, outcome in zip(jobs, outcomes, strict=True):
            if not outcome.errors:
                events += job.events
                results += outcome.records
        if not results:
            return
        codes = [reason["code"] for result in results for reason in result["reasons"]]
        self.metrics.count_scored(model.name, len(results), codes)
        if self.log is not None:
            self.log.submit(log_records(model, events, results))

    def log_status(self) -> LogStatus:
        if self.log is None:
            return LogStatus(status="off")
        return LogStatus(
            status="failing" if self.log.failing else "ok", folder=str(self.log.folder),
            error=self.log.error, written=self.log.written, dropped=self.log.dropped,
        )


def _invalid(errors: list[FieldError]) -> Problem:
    return Problem(422, f"{len(errors)} invalid field(s) in the request", "invalid-request", errors)


def _service(request: Request) -> Service:
    return request.app.state.service  # type: ignore[no-any-return]


def check_key(request: Request) -> None:
    """A valid key when keys are configured (401 without one, 403 with a wrong one)."""
    keys = _service(request).keys
    if keys.enabled:
        keys.check(presented_keys(request))


async def require_key(
    request: Request,
    _bearer: Annotated[HTTPAuthorizationCredentials | None, Security(bearer)],
    _header: Annotated[str | None, Security(api_key_header)],
) -> None:
    """Every endpoint but health and scoring (which call :func:`check_key` themselves).

    A coroutine, though it awaits nothing: FastAPI runs plain functions in a thread pool, and
    that hop cost more than the check itself on every request.
    """
    check_key(request)


async def require_admin(
    request: Request,
    _bearer: Annotated[HTTPAuthorizationCredentials | None, Security(bearer)],
    _header: Annotated[str | None, Security(api_key_header)],
) -> None:
    """Admin endpoints: a valid key always; with no keys only when explicitly allowed."""
    keys = _service(request).keys
    check_key(request)
    if not keys.enabled and not keys.admin_without_keys:
        raise Problem(
            403, "admin endpoints need API keys (CAUSELINE_API_KEYS); or set "
            "CAUSELINE_ADMIN_WITHOUT_KEYS=1 on a trusted network", "admin-disabled",
        )


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
    )
    app.state.service = service
    app.router.redirect_slashes = False  # /v1/score/ gets a 404 problem, not an empty 307
    problems.install(app)
    _routes(app)
    app.add_middleware(BodyLimitMiddleware, max_bytes=settings.max_body_bytes)
    app.add_middleware(MetricsMiddleware, metrics=service.metrics, routes=app.router.routes)
    return app


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


def _routes(app: FastAPI) -> None:
    keyed = [Depends(require_key)]

    # The scoring endpoints check the key and read the body themselves (see
    # service.api_requests); the OpenAPI document declares both as it would for dependencies.
    keyed_scoring: dict[str, Any] = {
        "response_model": ScoreResponse, "tags": ["scoring"],
        "responses": problems.responses(400, 401, 403, 413, 415, 422, 500),
    }
    security = [bearer.scheme_name, api_key_header.scheme_name]

    @app.post("/v1/score", openapi_extra=openapi_request(ScoreRequest, security),
              **keyed_scoring)
    async def score(request: Request) -> Response:
        """Probability, decision and ranked reason codes for each event."""
        check_key(request)
        payload = await read_body(request, ScoreRequest)
        return await _score(request, payload.model, payload.events, all_contributions(request))

    @app.post("/v1/score/timeline",
              openapi_extra=openapi_request(TimelineScoreRequest, security), **keyed_scoring)
    async def score_timeline(request: Request) -> Response:
        """Score one entity from its raw logs: the snapshot is built by the batch build's code."""
        check_key(request)
        payload = await read_body(request, TimelineScoreRequest)
        flag = all_contributions(request)
        current = _service(request).current
        assert current is not None
        model, schema = current.pick(payload.model)
        event = await run_in_threadpool(online_event, model.bundle, payload, schema.reject_unknown)
        return await _score(request, payload.model, [event], flag)

    @app.get("/v1/models", response_model=ModelList, dependencies=keyed, tags=["models"],
             responses=problems.responses(401, 403))
    def models(request: Request) -> ModelList:
        """The models served, by name and version."""
        current = _service(request).current
        assert current is not None
        served = current.served
        return ModelList(default=served.default, models=[
            ModelSummary(name=m.name, version=m.version, created=m.bundle.manifest.created,
                         default=m.name == served.default)
            for m in served.models.values()
        ])

    @app.get("/v1/models/{name}", response_model=ModelDescription, dependencies=keyed,
             tags=["models"], responses=problems.responses(401, 403, 404))
    def model(request: Request, name: str) -> ModelDescription:
        """A model's fields, features, reason-code catalogue, threshold and held-out metrics."""
        current = _service(request).current
        assert current is not None
        if name not in current.served.models:
            raise Problem(404, f"no model named {quoted(name)}", "unknown-model")
        return describe(current.served.models[name], current.schemas[name])

    @app.get("/v1/health/live", response_model=Liveness, tags=["health"])
    def live() -> Liveness:
        """The process answers."""
        return Liveness(status="ok")

    @app.get("/v1/health/ready", response_model=Readiness, tags=["health"],
             responses={503: {"model": Readiness, "description": "not ready"}})
    def ready(request: Request) -> Response:
        """Models loaded (and, when required, the prediction log writing)."""
        service = _service(request)
        current = service.current
        log = service.log_status()
        is_ready = current is not None and not (
            service.settings.prediction_log_required and log.status == "failing"
        )
        status = service.registry.status
        body = Readiness(
            status="ready" if is_ready else "not ready",
            models=[] if current is None else [
                ModelRef(name=n, version=v) for n, v in current.served.versions().items()
            ],
            default=None if current is None else current.served.default,
            loaded_at=None if current is None else current.served.loaded_at,
            last_reload=ReloadOut(ok=status.ok, attempted_at=status.attempted_at,
                                  error=status.error, failures=status.failures),
            prediction_log=log,
        )
        return JSONResponse(body.model_dump(), status_code=200 if is_ready else 503)

    @app.post("/v1/admin/reload", response_model=ReloadResult, tags=["admin"],
              dependencies=[Depends(require_admin)],
              responses=problems.responses(401, 403, 409))
    def reload(request: Request) -> ReloadResult:
        """Load the bundles again and swap them in; a bundle that fails verification is refused."""
        service = _service(request)
        try:
            previous, served = service.reload()
        except Exception:
            raise Problem(
                409, f"refused; the previous bundles keep serving: "
                f"{service.registry.status.error}", "bundle-refused",
            ) from None
        refs = [ModelRef(name=n, version=v) for n, v in served.versions().items()]
        before = [] if previous is None else [
            ModelRef(name=n, version=v) for n, v in previous.versions().items()
        ]
        return ReloadResult(models=refs, previous=before)

    @app.get("/metrics", dependencies=keyed, tags=["health"], response_class=Response,
             responses={200: {"content": {"text/plain": {}}, "description": "Prometheus text"},
                        **problems.responses(401, 403)})
    def metrics(request: Request) -> Response:
        """Prometheus metrics of this process."""
        data, content_type = _service(request).metrics.exposition()
        return Response(data, media_type=content_type)


async def _score(
    request: Request, name: str | None, events: list[dict[str, Any]], all_contributions: bool
) -> Response:
    """The scoring both endpoints share: checks and batched explanation (which counts and logs)."""
    service = _service(request)
    current = service.current
    assert current is not None
    model, schema = current.pick(name)
    limit = service.settings.max_events
    if len(events) > limit:
        raise Problem(
            413, f"{len(events)} events; at most {limit} per request",
            "too-many-events",
            [FieldError(field="events", message=f"at most {limit} events per request")],
        )
    errors = schema.check(events)
    if not errors:
        scored = await service.batcher.score(model, schema, events, all_contributions)
        errors = scored.errors
    if errors:
        raise Problem(
            422, f"{len(errors)} invalid field(s) in {len(events)} event(s)",
            "invalid-events", errors,
        )
    body = {"model": {"name": model.name, "version": model.version},
            "results": scored.records}
    return FastJSONResponse(body)


def describe(model: Model, schema: EventSchema) -> ModelDescription:
    """The model description served by ``GET /v1/models/{name}``."""
    manifest = model.bundle.manifest
    features = []
    for feature in manifest.dataset.features:
        stats = manifest.stats.get(feature.name)
        features.append(FeatureOut(
            name=feature.name,
            field=None if feature.derived else feature.source_column,
            expr=feature.expr, kind=feature.kind, role=feature.role, unit=feature.unit,
            description=feature.description, allow_missing=feature.allow_missing,
            categories=list(stats.categories) if stats and stats.categories else None,
            training_minimum=stats.minimum if stats else None,
            training_maximum=stats.maximum if stats else None,
            typical=stats.typical if stats else None,
        ))
    catalogue = [
        CodeOut(code=c.code, features=list(c.features), direction=c.direction, text=c.text,
                fix=None if c.fix is None else FixOut(
                    kind=c.fix.kind, action=c.fix.action, targets=dict(c.fix.targets)))
        for c in model.explainer.catalogue.codes
    ]
    return ModelDescription(
        name=model.name, version=model.version, created=manifest.created,
        threshold=manifest.decision.threshold, decision_rule=manifest.decision.rule,
        fields=FieldsOut(required=schema.required, optional=schema.optional),
        features=features, catalogue=catalogue, metrics=manifest.metrics,
    )
