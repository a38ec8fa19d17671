"""Errors as RFC 9457 problem details (``application/problem+json``).

Every error the service answers goes through here, so a client always gets the same shape and
never a stack trace: unexpected exceptions become a bare 500 and their traceback goes to the
server's log only.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping, Sequence
from http import HTTPStatus
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse, Response
from pydantic import BaseModel
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.requests import ClientDisconnect

MEDIA_TYPE = "application/problem+json"
TYPE_PREFIX = "urn:causeline:problem:"
CLIENT_CLOSED = 499
logger = logging.getLogger("causeline.service")


class FieldError(BaseModel):
    """One bad field: ``event`` is the position in ``events`` (absent for request-level fields)."""

    event: int | None = None
    field: str
    message: str


class ProblemDetails(BaseModel):
    """RFC 9457 problem details, with an ``errors`` extension listing every bad field."""

    type: str = "about:blank"
    title: str
    status: int
    detail: str | None = None
    errors: list[FieldError] | None = None


class Problem(Exception):
    """Raised anywhere in a request to answer with problem details."""

    def __init__(
        self,
        status: int,
        detail: str | None = None,
        kind: str | None = None,
        errors: Sequence[FieldError] | None = None,
        headers: Mapping[str, str] | None = None,
    ) -> None:
        super().__init__(detail or HTTPStatus(status).phrase)
        self.status = status
        self.detail = detail
        self.kind = kind
        self.errors = list(errors) if errors is not None else None
        self.headers = dict(headers or {})

    def response(self) -> JSONResponse:
        return problem_response(self.status, self.detail, self.kind, self.errors, self.headers)


def problem_response(
    status: int,
    detail: str | None = None,
    kind: str | None = None,
    errors: Sequence[FieldError] | None = None,
    headers: Mapping[str, str] | None = None,
) -> JSONResponse:
    body: dict[str, Any] = {
        "type": TYPE_PREFIX + kind if kind else "about:blank",
        "title": HTTPStatus(status).phrase,
        "status": status,
    }
    if detail:
        body["detail"] = detail
    if errors is not None:
        body["errors"] = [e.model_dump(exclude_none=True) for e in errors]
    return JSONResponse(
        body, status_code=status, media_type=MEDIA_TYPE, headers=dict(headers or {})
    )


def responses(*statuses: int) -> dict[int | str, dict[str, Any]]:
    """OpenAPI ``responses`` entries documenting problem details for ``statuses``."""
    return {
        status: {
            "model": ProblemDetails,
            "description": HTTPStatus(status).phrase,
            "content": {MEDIA_TYPE: {"schema": {"$ref": "#/components/schemas/ProblemDetails"}}},
        }
        for status in statuses
    }


def validation_errors(exc: RequestValidationError) -> list[FieldError]:
    """Pydantic's errors as field errors: ``body.events.3.x`` becomes event 3, field ``x``."""
    out = []
    for error in exc.errors():
        location = [part for part in error.get("loc", ()) if part != "body"]
        event = None
        if len(location) >= 2 and location[0] == "events" and isinstance(location[1], int):
            event = location[1]
            # The field; deeper parts name pydantic's union members. No field: the event itself.
            location = location[2:3] or ["events"]
        field = ".".join(str(part) for part in location) or "body"
        out.append(FieldError(event=event, field=field, message=_message(error)))
    return out


def _message(error: Mapping[str, Any]) -> str:
    kind = error.get("type", "")
    if kind == "missing":
        return "field is required"
    if kind == "extra_forbidden":
        return "unknown field"
    if kind in {"model_type", "dict_type", "model_attributes_type"}:
        return "expected a JSON object"  # pydantic's own text names internal classes
    return str(error.get("msg", "invalid value"))


def install(app: FastAPI) -> None:
    """Route every error the app can meet to problem details."""

    async def on_problem(request: Request, exc: Exception) -> JSONResponse:
        assert isinstance(exc, Problem)
        return exc.response()

    async def on_validation(request: Request, exc: Exception) -> JSONResponse:
        assert isinstance(exc, RequestValidationError)
        broken = [e for e in exc.errors() if e.get("type") == "json_invalid"]
        if broken:
            reason = str(broken[0].get("msg", ""))
            detail = "the request body is not valid JSON" + (f": {reason}" if reason else "")
            return problem_response(400, detail, "malformed-json")
        errors = _merge(validation_errors(exc))
        return problem_response(
            422, f"{len(errors)} invalid field(s) in the request", "invalid-request", errors
        )

    async def on_http(request: Request, exc: Exception) -> JSONResponse:
        assert isinstance(exc, StarletteHTTPException)
        detail = exc.detail if exc.detail != HTTPStatus(exc.status_code).phrase else None
        return problem_response(exc.status_code, detail, headers=exc.headers)

    async def on_hang_up(request: Request, exc: Exception) -> Response:
        # Nothing can be sent and nothing went wrong here: no traceback, and the request is
        # counted under 499 (nginx's "client closed request"), not as a server error.
        logger.info("client closed the connection during %s %s", request.method,
                    request.url.path)
        return Response(status_code=CLIENT_CLOSED)

    async def on_crash(request: Request, exc: Exception) -> JSONResponse:
        logger.error(
            "unhandled error on %s %s", request.method, request.url.path, exc_info=exc
        )
        return problem_response(500)

    app.add_exception_handler(Problem, on_problem)
    app.add_exception_handler(RequestValidationError, on_validation)
    app.add_exception_handler(StarletteHTTPException, on_http)
    app.add_exception_handler(ClientDisconnect, on_hang_up)
    app.add_exception_handler(Exception, on_crash)


def _merge(errors: list[FieldError]) -> list[FieldError]:
    """One entry per (event, field): a union type reports once per member otherwise."""
    seen: dict[tuple[int | None, str], FieldError] = {}
    for error in errors:
        seen.setdefault((error.event, error.field), error)
    return list(seen.values())
