"""The scoring route's short way past the framework answers exactly as the usual stack does.

A body sent in chunks has no declared length, so it goes down the usual stack; the same body
with a Content-Length takes the short way. Each pair of answers must match: status, media type,
headers that matter and the JSON itself, for accepted and refused requests alike.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pandas as pd
import pytest
from fastapi.testclient import TestClient
from starlette.routing import Router

from causeline.service.api.app import create_app
from causeline.service.api.settings import Settings
from causeline.service.bundle.load import Bundle
from tests.api.test_api import KEY, demo_events, metric


@pytest.fixture(scope="module")
def client(
    demo_bundle: Bundle, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[TestClient]:
    log = tmp_path_factory.mktemp("log")
    app = create_app(Settings(bundle=demo_bundle.path, prediction_log=str(log), api_keys=KEY,
                              max_events=5, max_body_bytes=4096))
    with TestClient(app, raise_server_exceptions=False) as test_client:
        yield test_client


@pytest.fixture(scope="module")
def events(demo_table: pd.DataFrame, demo_bundle: Bundle) -> list[dict[str, Any]]:
    return demo_events(demo_table, Path(demo_bundle.path), rows=4)


@pytest.fixture
def routed(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """Paths that went through the framework's router, request by request."""
    seen: list[str] = []
    original = Router.__call__

    async def spy(self: Router, scope: Any, receive: Any, send: Any) -> None:
        seen.append(scope["path"])
        await original(self, scope, receive, send)

    monkeypatch.setattr(Router, "__call__", spy)
    return seen


def both_ways(client: TestClient, body: bytes, query: str = "",
              headers: dict[str, str] | None = None) -> tuple[httpx.Response, httpx.Response]:
    """The same request with a declared length, and in chunks (no declared length)."""
    sent = {"content-type": "application/json", **(headers if headers is not None else
                                                    {"X-API-Key": KEY})}
    url = "/v1/score" + query
    declared = client.post(url, content=body, headers=sent)
    chunked = client.post(url, content=iter([body[: len(body) // 2], body[len(body) // 2:]]),
                          headers=sent)
    return declared, chunked


def same(declared: httpx.Response, chunked: httpx.Response) -> None:
    assert declared.status_code == chunked.status_code
    for name in ("content-type", "www-authenticate", "accept-encoding"):
        assert declared.headers.get(name) == chunked.headers.get(name), name
    assert declared.json() == chunked.json()


def test_a_scored_request_is_answered_alike_and_skips_the_router(
    client: TestClient, events: list[dict], routed: list[str]
) -> None:
    body = json.dumps({"events": events[:2]}).encode()
    declared, chunked = both_ways(client, body, "?contributions=all")
    assert declared.status_code == 200
    assert len(declared.json()["results"]) == 2 and "contributions" in declared.json()["results"][0]
    same(declared, chunked)
    assert routed == ["/v1/score"]  # the chunked one only


@pytest.mark.parametrize("case", [
    "broken json", "empty body", "not an object", "misspelt field", "unknown category",
    "too many events", "unknown model", "bad flag", "no key", "wrong key", "text body",
    "encoded body",
])
def test_a_refused_request_is_refused_alike(
    client: TestClient, events: list[dict], routed: list[str], case: str
) -> None:
    event = events[0]
    body, query, headers = json.dumps({"events": [event]}).encode(), "", None
    if case == "broken json":
        body = b'{"events": [{'
    elif case == "empty body":
        body = b" "
    elif case == "not an object":
        body = b"[1, 2]"
    elif case == "misspelt field":
        typo = {k: v for k, v in event.items() if k != "case_type"} | {"case_typ": "x"}
        body = json.dumps({"events": [typo]}).encode()
    elif case == "unknown category":
        body = json.dumps({"events": [{**event, "case_type": "igloo"}]}).encode()
    elif case == "too many events":
        body = json.dumps({"events": [event] * 6}).encode()
    elif case == "unknown model":
        body = json.dumps({"model": "nope", "events": [event]}).encode()
    elif case == "bad flag":
        query = "?contributions=some"
    elif case == "no key":
        headers = {}
    elif case == "wrong key":
        headers = {"Authorization": "Bearer nope"}
    elif case == "text body":
        headers = {"X-API-Key": KEY, "content-type": "text/plain"}
    elif case == "encoded body":
        headers = {"X-API-Key": KEY, "content-encoding": "gzip"}
    declared, chunked = both_ways(client, body, query, headers)
    assert declared.status_code >= 400, declared.text
    assert declared.headers["content-type"].startswith("application/problem+json")
    same(declared, chunked)
    assert routed == ["/v1/score"]


def test_requests_are_counted_under_the_route_either_way(
    client: TestClient, events: list[dict]
) -> None:
    def count(status: str) -> float:
        text = client.get("/metrics", headers={"X-API-Key": KEY}).text
        return metric(text, "causeline_http_requests_total", route="/v1/score", status=status)

    before = {status: count(status) for status in ("200", "401", "413")}
    both_ways(client, json.dumps({"events": events[:1]}).encode())
    both_ways(client, json.dumps({"events": events[:1]}).encode(), headers={})
    big = json.dumps({"events": events[:1], "padding": "x" * 5000}).encode()
    assert client.post("/v1/score", content=big, headers={"X-API-Key": KEY}).status_code == 413
    assert count("200") == before["200"] + 2
    assert count("401") == before["401"] + 2
    assert count("413") == before["413"] + 1
