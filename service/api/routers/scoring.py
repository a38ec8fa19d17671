"""``POST /v1/score`` and ``POST /v1/score/timeline``: probabilities, decisions and reason codes.

Both check the key and read the body themselves (see :mod:`causeline.service.api.reading`):
FastAPI's per-request solving of a declared body, query flag and security schemes cost more than
the checks. The OpenAPI document declares both as it would for dependencies.
"""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import Response
from starlette.concurrency import run_in_threadpool

from causeline.service.api import changes, problems
from causeline.service.api.auth import api_key_header, bearer
from causeline.service.api.bodies import ScoreRequest, ScoreResponse, TimelineScoreRequest
from causeline.service.api.dependencies import check_key, service_of
from causeline.service.api.jsonio import FastJSONResponse
from causeline.service.api.problems import FieldError, Problem
from causeline.service.api.reading import (
    all_contributions,
    openapi_request,
    read_body,
    read_events,
)
from causeline.service.api.state import Service
from causeline.service.api.timeline import online_event

router = APIRouter(tags=["scoring"])
SCORE_PATH = "/v1/score"
_SCORING: dict[str, Any] = {
    "response_model": ScoreResponse,
    "responses": problems.responses(400, 401, 403, 413, 415, 422, 500),
}
_SECURITY = [bearer.scheme_name, api_key_header.scheme_name]


@router.post(SCORE_PATH, openapi_extra=openapi_request(ScoreRequest, _SECURITY), **_SCORING)
async def score(request: Request) -> Response:
    """Probability, decision and ranked reason codes for each event."""
    service = service_of(request)
    check_key(request, service)
    name, events = await read_events(request)
    return await _score(service, name, events, all_contributions(request), _wanted(request))


@router.post("/v1/score/timeline", response_model=ScoreResponse,
             responses=problems.responses(400, 401, 403, 409, 413, 415, 422, 500),
             openapi_extra=openapi_request(TimelineScoreRequest, _SECURITY))
async def score_timeline(request: Request) -> Response:
    """Score one entity from its raw logs, now (its latest reading or failure) or at ``at``:
    the snapshot is built by the batch build's code. An entity that is down then (a failure
    it has not come back from, by the config's down rules) is refused with 409."""
    service = service_of(request)
    check_key(request, service)
    payload = await read_body(request, TimelineScoreRequest)
    flag = all_contributions(request)
    current = service.current
    assert current is not None
    model, schema = current.pick(payload.model)
    event = await run_in_threadpool(online_event, model.bundle, payload, schema.reject_unknown)
    return await _score(service, payload.model, [event], flag, _wanted(request))


def _wanted(request: Request) -> int | None:
    """The what-to-change flag, read only when the request has a query (most have none)."""
    if not request.scope.get("query_string"):
        return None
    return changes.flag_value(request.query_params.get(changes.FLAG))


async def _score(
    service: Service, name: str | None, events: list[dict[str, Any]], all_contributions: bool,
    what_to_change: int | None = None,
) -> Response:
    """The scoring both endpoints share: checks and batched explanation (which counts and logs)."""
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
    results = scored.records
    if what_to_change is not None:
        found = await run_in_threadpool(changes.records, model, events, what_to_change,
                                        current.finders)
        results = [{**result, "what_to_change": record}
                   for result, record in zip(results, found, strict=True)]
    body = {"model": {"name": model.name, "version": model.version},
            "results": results, "ignored_fields": schema.ignored(events)}
    return FastJSONResponse(body)
