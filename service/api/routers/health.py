"""``GET /v1/health/live`` and ``GET /v1/health/ready`` for probes (never behind a key), and
``GET /metrics`` in Prometheus text."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Request
from fastapi.responses import JSONResponse, Response

from causeline.service.api import problems
from causeline.service.api.bodies import Liveness, ModelRef, Readiness, ReloadOut
from causeline.service.api.dependencies import require_key, service_of

router = APIRouter(tags=["health"])


@router.get("/v1/health/live", response_model=Liveness)
def live() -> Liveness:
    """The process answers."""
    return Liveness(status="ok")


@router.get("/v1/health/ready", response_model=Readiness,
            responses={503: {"model": Readiness, "description": "not ready"}})
def ready(request: Request) -> Response:
    """Models loaded (and, when required, the prediction log writing)."""
    service = service_of(request)
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


@router.get("/metrics", dependencies=[Depends(require_key)], response_class=Response,
            responses={200: {"content": {"text/plain": {}}, "description": "Prometheus text"},
                       **problems.responses(401, 403)})
def metrics(request: Request) -> Response:
    """Prometheus metrics of this process."""
    data, content_type = service_of(request).metrics.exposition()
    return Response(data, media_type=content_type)
