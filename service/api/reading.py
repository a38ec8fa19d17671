"""Reading a scoring request by hand: its JSON body into a pydantic model, and its query flag.

FastAPI would do both from the endpoint's signature, but on the scoring path its per-request
machinery cost more than the checks themselves. Measured in-process on this project's machine
(one CPU): a route taking only the request 106 us, the same route with a declared body model, a
query parameter and two security schemes 227 us, while validating the body with the same model
costs about 10 us. So the scoring endpoints take the ``Request`` and call these helpers, which
answer as FastAPI would (400 for broken JSON, 422 naming every bad field) and describe the same
request in the OpenAPI document through ``openapi_extra``.
"""

from __future__ import annotations

from typing import Any, TypeVar

from fastapi import Request
from fastapi.exceptions import RequestValidationError
from pydantic import BaseModel, ValidationError
from starlette.requests import ClientDisconnect

from causeline.service.api import jsonio as api_json
from causeline.service.api.bodies import ScoreRequest
from causeline.service.api.problems import FieldError, Problem

Model = TypeVar("Model", bound=BaseModel)

BOM = b"\xef\xbb\xbf"
SCORE_FIELDS = ScoreRequest.model_fields.keys()
CONTRIBUTIONS_HELP = "'all' adds every feature's contribution and base value"
CHANGES_HELP = ("adds to each event at or above the threshold the cheapest allowed change of at "
                "most N controllable features (empty: 2) that brings it below; needs the "
                "config's `change:` settings")


async def read_body(request: Request, model: type[Model]) -> Model:
    """The request's JSON body validated into ``model``."""
    return _validated(model, await read_json(request))


async def read_events(request: Request) -> tuple[str | None, list[dict[str, Any]]]:
    """A scoring body's model name and events, as :class:`ScoreRequest` reads them.

    The usual body (an object holding ``events``, a non-empty list of objects, and perhaps
    ``model``, text or null) is taken as parsed: validating it into the model, which copies
    every event, cost more than checking its shape here. Any other body goes through
    ``ScoreRequest``, so a refusal names the same fields in the same words.
    """
    data = await read_json(request)
    if type(data) is dict and data.keys() <= SCORE_FIELDS:
        events, model = data.get("events"), data.get("model")
        if (type(events) is list and events and all(type(event) is dict for event in events)
                and (model is None or type(model) is str)):
            return model, events
    payload = _validated(ScoreRequest, data)
    return payload.model, payload.events


async def read_json(request: Request) -> Any:
    """The request's body parsed as JSON (400 when it is not, 415 for another media type)."""
    media, coding = _headers(request)
    if media is not None and not _is_json(media):
        raise Problem(415, f"the body is sent as {media[:60]!r}; send it as JSON with the "
                      "header Content-Type: application/json", "unsupported-media-type")
    if coding is not None and coding.strip().lower() not in {"", "identity"}:
        # RFC 9110 section 15.5.16: an unsupported content coding is a 415.
        raise Problem(415, f"the body is sent with Content-Encoding {coding[:40]!r}; send it "
                      "unencoded", "unsupported-media-type",
                      headers={"Accept-Encoding": "identity"})
    body = await _read(request)
    if body.startswith(BOM):  # RFC 8259 section 8.1: a parser may ignore one
        body = body[len(BOM):]
    if not body.strip():
        raise RequestValidationError([{"type": "missing", "loc": ("body",), "msg": "required"}])
    try:
        return api_json.loads(body)
    except ValueError as exc:  # the parser's words, say "number out of range at line 1 ..."
        raise RequestValidationError(
            [{"type": "json_invalid", "loc": ("body",), "msg": str(exc)[:200]}]
        ) from None


def _headers(request: Request) -> tuple[str | None, str | None]:
    """The first Content-Type and Content-Encoding, as ``request.headers`` gives them, read in
    one pass (a missing header costs ``Headers.get`` a raised and caught KeyError)."""
    media = coding = None
    for name, value in request.scope["headers"]:
        if name == b"content-type" and media is None:
            media = value.decode("latin-1")
        elif name == b"content-encoding" and coding is None:
            coding = value.decode("latin-1")
    return media, coding


def _validated(model: type[Model], data: Any) -> Model:
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        raise RequestValidationError(exc.errors(include_url=False)) from None


async def _read(request: Request) -> bytes:
    """The whole body, straight from ``receive`` (Starlette's stream adds an async generator)."""
    chunks = []
    while True:
        message = await request.receive()
        if message["type"] == "http.disconnect":
            raise ClientDisconnect()
        chunks.append(message.get("body", b""))
        if not message.get("more_body", False):
            return b"".join(chunks)


def all_contributions(request: Request) -> bool:
    """The ``contributions`` query flag: absent, or ``all``."""
    if not request.scope.get("query_string"):  # the usual case; parsing costs more
        return False
    value = request.query_params.get("contributions")
    if value is None:
        return False
    if value != "all":
        raise Problem(422, "1 invalid field(s) in the request", "invalid-request",
                      [FieldError(field="contributions", message="must be 'all' or absent")])
    return True


def openapi_request(model: type[BaseModel], security: list[str]) -> dict[str, Any]:
    """``openapi_extra`` declaring what :func:`read_body` and :func:`all_contributions` read."""
    schema = model.model_json_schema()
    # Inlined in the operation, so nested models (which would need components) are not allowed.
    assert "$defs" not in schema, f"{model.__name__} nests models; declare it as a component"
    return {
        "requestBody": {
            "required": True,
            "content": {"application/json": {"schema": schema}},
        },
        "parameters": [{
            "name": "contributions", "in": "query", "required": False,
            "description": CONTRIBUTIONS_HELP,
            "schema": {"anyOf": [{"const": "all", "type": "string"}, {"type": "null"}],
                       "description": CONTRIBUTIONS_HELP},
        }, {
            "name": "what-to-change", "in": "query", "required": False,
            "description": CHANGES_HELP, "allowEmptyValue": True,
            "schema": {"type": "string", "enum": ["", "1", "2", "3", "4"],
                       "description": CHANGES_HELP},
        }],
        "security": [{name: []} for name in security],
    }


def _is_json(media: str) -> bool:
    kind = media.split(";", 1)[0].strip().lower()
    return kind == "application/json" or (
        kind.startswith("application/") and kind.endswith("+json")
    )
