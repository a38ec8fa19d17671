"""Reading a scoring body by hand answers as pydantic's validation of ``ScoreRequest`` does.

``read_events`` takes the usual body as parsed and sends every other one through the model;
pydantic (a reference library) is the judge of both: the same model name and events for a body
it accepts, the same errors for one it refuses.
"""

from __future__ import annotations

import asyncio
import json
from typing import Any

import pytest
from fastapi.exceptions import RequestValidationError
from opentelemetry import trace
from pydantic import ValidationError
from starlette.requests import Request

from causeline.service.api import app as api_app
from causeline.service.api.bodies import ScoreRequest
from causeline.service.api.reading import read_events

EVENT = {"a": 1.5, "b": None, "c": "text", "d": 3}


def read(body: Any) -> tuple[str | None, list[dict[str, Any]]]:
    raw = json.dumps(body).encode()
    scope = {"type": "http", "method": "POST", "path": "/v1/score", "query_string": b"",
             "headers": [(b"content-type", b"application/json"),
                         (b"content-length", str(len(raw)).encode())]}

    async def receive() -> dict[str, Any]:
        return {"type": "http.request", "body": raw, "more_body": False}

    return asyncio.run(read_events(Request(scope, receive)))


@pytest.mark.parametrize("body", [
    {"events": [EVENT]},
    {"events": [EVENT, {}], "model": "display-cases"},
    {"model": None, "events": [EVENT]},
])
def test_an_accepted_body_reads_as_the_model_reads_it(body: dict[str, Any]) -> None:
    expected = ScoreRequest.model_validate(body)
    assert read(body) == (expected.model, expected.events)


@pytest.mark.parametrize("body", [
    [EVENT],
    {},
    {"events": []},
    {"events": EVENT},
    {"events": [EVENT, 1]},
    {"events": [[1]]},
    {"events": [EVENT], "model": 3},
    {"events": [EVENT], "extra": True},
    {"model": "display-cases"},
])
def test_a_refused_body_has_the_models_errors(body: Any) -> None:
    with pytest.raises(ValidationError) as expected:
        ScoreRequest.model_validate(body)
    with pytest.raises(RequestValidationError) as found:
        read(body)
    assert found.value.errors() == expected.value.errors(include_url=False)


def test_frameworks_telemetry_is_off_unless_a_provider_is_set_up(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    assert api_app.telemetry() == {
        "telemetry": {"tracing": False, "metrics": False, "logs": False}}

    class Provider:  # stands for an SDK's provider, set up before the app is made
        pass

    monkeypatch.setattr(trace, "get_tracer_provider", Provider)
    assert api_app.telemetry() == {}
