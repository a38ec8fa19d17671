"""The HTTP API in-process (FastAPI's TestClient), every answer checked against its own OpenAPI."""

from __future__ import annotations

import asyncio
import collections
import gc
import json
import shutil
import threading
import weakref
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import httpx
import jsonschema
import pandas as pd
import pytest
import yaml
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

from causeline.cli import main as causeline
from causeline.service.api import batcher as api_scoring
from causeline.service.api.app import create_app
from causeline.service.api.logwriter import BackgroundLog
from causeline.service.api.metrics import Metrics
from causeline.service.api.settings import Settings
from causeline.service.bundle.load import Bundle, load_bundle
from causeline.service.bundle.manifest import CHECKSUMS, MANIFEST, MODEL
from causeline.service.files.checksum import checksum_text
from causeline.service.files.predlog import read_prediction_log
from tests.conftest import DEMO_CONFIG

KEY = "test-key-0123456789"


# ---------------------------------------------------------------- helpers shared with other tests


def demo_events(table: pd.DataFrame, bundle_path: Path, rows: int = 12) -> list[dict[str, Any]]:
    """Demo rows as JSON events: the bundle's fields plus the id, flagged rows included."""
    bundle = load_bundle(bundle_path)
    columns = [*bundle.builder.required_columns, bundle.spec.id]
    picked = pd.concat([table[table["went_warm_24h"] == 1].head(rows // 2), table.head(rows)])
    picked = picked.drop_duplicates(bundle.spec.id).head(rows)
    return json.loads(picked[columns].to_json(orient="records"))


def rewrite_bundle(source: Path, target: Path, **manifest: Any) -> Path:
    """A copy of a bundle with manifest keys changed and checksums made to match again."""
    shutil.copytree(source, target)
    raw = json.loads((target / MANIFEST).read_text("utf-8"))
    raw.update(manifest)
    (target / MANIFEST).write_text(json.dumps(raw), "utf-8")
    names = [line.split("  ", 1)[1] for line in (target / CHECKSUMS).read_text().splitlines()]
    (target / CHECKSUMS).write_text(checksum_text(target, names), "utf-8")
    return target


def tamper(bundle: Path) -> None:
    """Change the model file without updating its checksum."""
    with open(bundle / MODEL, "a", encoding="utf-8") as handle:
        handle.write("\n")


class OpenAPICheck:
    """Validates responses against the schema the app publishes at /openapi.json."""

    def __init__(self, spec: dict[str, Any]) -> None:
        self.spec = spec

    def __call__(self, response: httpx.Response, path: str, method: str = "post") -> Any:
        answers = self.spec["paths"][path][method]["responses"]
        entry = answers.get(str(response.status_code))
        assert entry is not None, f"{response.status_code} is not documented for {path}"
        media = response.headers["content-type"].split(";")[0]
        assert media in entry["content"], f"{media} not documented for {response.status_code}"
        body = response.json()
        schema = {**entry["content"][media]["schema"], "components": self.spec["components"]}
        jsonschema.Draft202012Validator(schema).validate(body)
        return body


def metric(text: str, name: str, **labels: str) -> float:
    """A sample's value from Prometheus text (0 when absent)."""
    total = 0.0
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            if sample.name == name and all(sample.labels.get(k) == v for k, v in labels.items()):
                total += sample.value
    return total


# ---------------------------------------------------------------- fixtures


@pytest.fixture(scope="session")
def demo_bundle_path(demo_bundle: Bundle) -> Path:
    """The session's demo bundle folder; tests copy it before changing anything."""
    return demo_bundle.path


@pytest.fixture(scope="module")
def events(demo_table: pd.DataFrame, demo_bundle_path: Path) -> list[dict[str, Any]]:
    return demo_events(demo_table, demo_bundle_path)


@pytest.fixture
def make_client(
    tmp_path: Path, demo_bundle_path: Path
) -> Iterator[Callable[..., TestClient]]:
    clients: list[TestClient] = []

    def make(**settings: Any) -> TestClient:
        values = {"bundle": demo_bundle_path, "prediction_log": str(tmp_path / "log"),
                  "access_log": False, **settings}
        client = TestClient(create_app(Settings(**values)), raise_server_exceptions=False)
        client.__enter__()
        clients.append(client)
        return client

    yield make
    for client in clients:
        client.__exit__(None, None, None)


@pytest.fixture(scope="module")
def client(
    demo_bundle_path: Path, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[TestClient]:
    log = tmp_path_factory.mktemp("log")
    app = create_app(Settings(bundle=demo_bundle_path, prediction_log=str(log), max_events=50))
    with TestClient(app, raise_server_exceptions=False) as test_client:
        yield test_client


@pytest.fixture(scope="module")
def openapi(client: TestClient) -> OpenAPICheck:
    return OpenAPICheck(client.get("/openapi.json").json())


def post_raw(client: TestClient, body: bytes) -> httpx.Response:
    return client.post("/v1/score", content=body, headers={"content-type": "application/json"})


def refused(response: httpx.Response, openapi: OpenAPICheck, status: int = 422) -> list[dict]:
    assert response.status_code == status, response.text
    assert response.headers["content-type"].startswith("application/problem+json")
    body = openapi(response, "/v1/score")
    assert body["status"] == status
    return body.get("errors", [])


# ---------------------------------------------------------------- scoring


def test_scores_and_contributions_equal_the_command_line(
    client: TestClient, openapi: OpenAPICheck, events: list[dict[str, Any]],
    demo_bundle_path: Path, tmp_path: Path,
) -> None:
    events = [dict(e) for e in events]
    events[1]["store_ambient_c"] = None  # a missing value travels the same way in both paths
    source = tmp_path / "events.jsonl"
    source.write_text("".join(json.dumps(e) + "\n" for e in events), "utf-8")
    out = tmp_path / "explained.jsonl"
    assert causeline(["explain", "--bundle", str(demo_bundle_path), "--input", str(source),
                      "--out", str(out), "--all-contributions"]) == 0
    expected = [json.loads(line) for line in out.read_text("utf-8").splitlines()]

    response = client.post("/v1/score?contributions=all", json={"events": events})
    assert response.status_code == 200, response.text
    body = openapi(response, "/v1/score")
    assert body["model"]["name"] == "display-cases"
    results = body["results"]
    assert [r["id"] for r in results] == [e["id"] for e in expected]
    assert any(r["decision"] for r in results) and not all(r["decision"] for r in results)
    for got, want in zip(results, expected, strict=True):
        assert got["probability"] == pytest.approx(want["probability"], abs=1e-12)
        assert got["decision"] == want["decision"]
        assert got["base_value"] == pytest.approx(want["base_value"], abs=1e-12)
        assert got["contributions"].keys() == want["contributions"].keys()
        for name, value in want["contributions"].items():
            assert got["contributions"][name] == pytest.approx(value, abs=1e-12)
        assert [r["code"] for r in got["reasons"]] == [r["code"] for r in want["reasons"]]
        for mine, theirs in zip(got["reasons"], want["reasons"], strict=True):
            assert mine["contribution"] == pytest.approx(theirs["contribution"], abs=1e-12)
            assert mine["text"] == theirs["text"]


def test_plain_scores_omit_contributions(
    client: TestClient, openapi: OpenAPICheck, events: list[dict[str, Any]]
) -> None:
    body = openapi(client.post("/v1/score", json={"events": events[:1]}), "/v1/score")
    (result,) = body["results"]
    assert "contributions" not in result and "base_value" not in result
    assert result["id"] == events[0]["snapshot_id"]


def test_event_without_id_gets_its_position(client: TestClient, events: list[dict]) -> None:
    bare = [{k: v for k, v in e.items() if k != "snapshot_id"} for e in events[:2]]
    response = client.post("/v1/score", json={"events": bare})
    assert [r["id"] for r in response.json()["results"]] == ["0", "1"]


def test_value_outside_training_range_is_scored_with_a_warning(
    client: TestClient, openapi: OpenAPICheck, events: list[dict], demo_bundle_path: Path
) -> None:
    top = load_bundle(demo_bundle_path).manifest.stats["door_openings_per_h"].maximum
    event = {**events[0], "door_openings_per_h": top * 10}
    body = openapi(client.post("/v1/score", json={"events": [event]}), "/v1/score")
    (warning,) = body["results"][0]["warnings"]
    assert "door_openings_per_h" in warning and "outside the training range" in warning


def test_concurrent_requests_batched_together_equal_each_alone(
    client: TestClient, events: list[dict], demo_bundle_path: Path
) -> None:
    alone = [client.post("/v1/score", json={"events": [e]}).json()["results"][0]
             for e in events[:6]]
    # Explaining several requests' rows in one call must give each request what it gets alone,
    # and a bad row in one request must not touch another's.
    served = client.app.state.service.current
    model, schema = served.pick(None)
    broken = {**events[6], "case_type": "igloo"}
    jobs = [
        api_scoring.Job(model, schema, group, [e["snapshot_id"] for e in group], False, None)
        for group in (events[:2], [broken], events[2:6])
    ]
    first, bad, second = api_scoring.explain_jobs(jobs)
    assert bad.records == [] and bad.errors[0].field == "case_type"
    assert bad.errors[0].event == 0
    assert first.records + second.records == alone


def test_client_that_hangs_up_mid_body_is_no_server_error(
    client: TestClient, caplog: pytest.LogCaptureFixture
) -> None:
    # A client may give up before its body arrives (a declared length never sent): nothing
    # failed on the server, so no 500 is counted (alerts watch 5xx) and no traceback logged.
    before = metric(client.get("/metrics").text, "causeline_http_requests_total", status="499")
    sent: list[dict[str, Any]] = []

    async def receive() -> dict[str, Any]:
        return {"type": "http.disconnect"}

    async def send(message: dict[str, Any]) -> None:
        sent.append(message)

    scope = {"type": "http", "asgi": {"version": "3.0"}, "http_version": "1.1",
             "method": "POST", "scheme": "http", "path": "/v1/score", "raw_path": b"/v1/score",
             "query_string": b"", "root_path": "", "client": ("127.0.0.1", 1),
             "server": ("127.0.0.1", 2), "headers": [
                 (b"host", b"x"), (b"content-type", b"application/json"),
                 (b"content-length", b"5000")]}
    with caplog.at_level("INFO", logger="causeline.service"):
        asyncio.run(client.app(scope, receive, send))
    text = client.get("/metrics").text
    assert metric(text, "causeline_http_requests_total", status="499") == before + 1
    assert metric(text, "causeline_http_requests_total", route="/v1/score", status="500") == 0
    assert not [r for r in caplog.records if r.levelname in {"ERROR", "CRITICAL"}]
    assert any("closed the connection" in r.getMessage() for r in caplog.records)


def test_a_failing_batch_hook_still_answers_every_request(
    client: TestClient, events: list[dict]
) -> None:
    # The hook counts and logs; if it fails, the requests of its batch must still be answered.
    model, schema = client.app.state.service.current.pick(None)
    calls: list[int] = []

    def broken_hook(*_: Any) -> None:
        calls.append(1)
        raise RuntimeError("log unavailable")

    async def score_three() -> list[api_scoring.Scored]:
        batcher = api_scoring.Batcher(scored=broken_hook)
        requests = [batcher.score(model, schema, [event], False) for event in events[:3]]
        return await asyncio.wait_for(asyncio.gather(*requests), timeout=60)

    outcomes = asyncio.run(score_three())
    assert calls and [len(outcome.records) for outcome in outcomes] == [1, 1, 1]


# ---------------------------------------------------------------- input errors, one test each


def test_missing_feature(client: TestClient, openapi: OpenAPICheck, events: list[dict]) -> None:
    event = {k: v for k, v in events[0].items() if k != "setpoint_c"}
    errors = refused(client.post("/v1/score", json={"events": [events[1], event]}), openapi)
    assert errors == [{"event": 1, "field": "setpoint_c",
                       "message": "field is required (send null for an unknown value)"}]


def test_wrong_type(client: TestClient, openapi: OpenAPICheck, events: list[dict]) -> None:
    event = {**events[0], "compressor_duty_pct": "forty", "case_type": [1]}
    errors = refused(client.post("/v1/score", json={"events": [event]}), openapi)
    assert {(e["field"], e["message"]) for e in errors} == {
        ("compressor_duty_pct", "expected a number, got a string"),
        ("case_type", "expected a string (a category), got an array"),
    }


def test_nan_token(client: TestClient, openapi: OpenAPICheck, events: list[dict]) -> None:
    # RFC 8259 section 6: NaN and Infinity are not JSON numbers, though Python's parser takes them.
    body = json.dumps({"events": [{**events[0], "month": float("nan")}]}).encode()
    assert b"NaN" in body
    errors = refused(post_raw(client, body), openapi)
    assert [(e["event"], e["field"]) for e in errors] == [(0, "month")]
    assert "NaN" in errors[0]["message"]


def test_infinity_token(client: TestClient, openapi: OpenAPICheck, events: list[dict]) -> None:
    body = json.dumps({"events": [{**events[0], "setpoint_c": float("-inf")}]}).encode()
    errors = refused(post_raw(client, body), openapi)
    assert [(e["field"], e["message"].split()[0]) for e in errors] == [("setpoint_c", "Infinity")]


def test_number_out_of_range(client: TestClient, openapi: OpenAPICheck, events: list[dict]) -> None:
    # RFC 8259 section 6 puts no limit on a number's size; one past float64's cannot be scored.
    body = json.dumps({"events": [events[0], {**events[1], "setpoint_c": -(10**400)}]}).encode()
    errors = refused(post_raw(client, body), openapi)
    assert [(e["event"], e["field"]) for e in errors] == [(1, "setpoint_c")]
    assert "out of range" in errors[0]["message"]


def test_unknown_category(client: TestClient, openapi: OpenAPICheck, events: list[dict]) -> None:
    event = {**events[0], "controller_firmware": "9.9.9"}
    errors = refused(client.post("/v1/score", json={"events": [events[1], event]}), openapi)
    assert errors == [{"event": 1, "field": "controller_firmware",
                       "message": "unknown category '9.9.9'"}]


def test_long_texts_are_refused_or_cut_in_messages(
    client: TestClient, openapi: OpenAPICheck, events: list[dict]
) -> None:
    # An id goes into the prediction log and the root-cause CSVs (spreadsheets hold at most
    # 32,767 characters in a cell, from memory); a refused value must not be echoed in full.
    errors = refused(client.post("/v1/score", json={"events": [
        {**events[0], "snapshot_id": "x" * 257}]}), openapi)
    assert errors == [{"event": 0, "field": "snapshot_id",
                       "message": "longer than 256 characters"}]
    errors = refused(client.post("/v1/score", json={"events": [
        {**events[0], "case_type": "y" * 1_000_000}]}), openapi)
    assert errors[0]["field"] == "case_type" and len(errors[0]["message"]) < 100
    # A field the model does not use is scored past and named, cut like any echoed name.
    body = openapi(client.post("/v1/score", json={"events": [
        {**events[0], "z" * 10_000: 1}]}), "/v1/score")
    assert body["ignored_fields"] == ["z" * 256]
    errors = refused(client.post("/v1/score", json={"model": "m" * 10_000, "events": events}),
                     openapi)
    assert len(errors[0]["message"]) < 200


def test_trailing_slash_is_not_redirected(client: TestClient, events: list[dict]) -> None:
    response = client.post("/v1/score/", json={"events": events[:1]}, follow_redirects=False)
    assert response.status_code == 404
    assert response.headers["content-type"].startswith("application/problem+json")


def test_missing_values_are_scored_and_named_in_warnings(
    client: TestClient, events: list[dict]
) -> None:
    # The trees score a missing value by the side training sent it (LightGBM's missing-value
    # handling), so an event of nulls still gets a score; it must say what it rests on.
    fields = [name for name, value in events[0].items()
              if name != "snapshot_id" and not isinstance(value, str)]
    empty = {**events[0], **dict.fromkeys(fields)}
    result = client.post("/v1/score", json={"events": [events[0], empty]}).json()["results"]
    assert not any(w.startswith("no value for") for w in result[0]["warnings"])
    told = [w for w in result[1]["warnings"] if w.startswith("no value for")]
    assert len(told) == 1 and f"({len(fields)} of " in told[0]
    assert all(name in told[0] for name in fields)


def test_fields_the_model_does_not_use_are_scored_past_and_named(
    client: TestClient, openapi: OpenAPICheck, events: list[dict]
) -> None:
    # Callers send whole records (a product id, a store name): by default the model's own
    # fields are scored and the others named, with the same answer as without them.
    plain = openapi(client.post("/v1/score", json={"events": events[:2]}), "/v1/score")
    assert plain["ignored_fields"] == []
    whole = [{**events[0], "store_id": "ST-01", "note": "x"}, {**events[1], "store_id": "S"}]
    body = openapi(client.post("/v1/score", json={"events": whole}), "/v1/score")
    assert body["ignored_fields"] == ["store_id", "note"]
    assert body["results"] == plain["results"]
    # A misspelt top-level key is still refused: the request's own shape is fixed.
    errors = refused(client.post("/v1/score", json={"events": [events[0]], "x": 1}), openapi)
    assert errors == [{"field": "x", "message": "unknown field"}]


def test_a_misspelt_field_is_refused_not_ignored(
    client: TestClient, openapi: OpenAPICheck, events: list[dict]
) -> None:
    event = {k: v for k, v in events[0].items() if k != "setpoint_c"} | {"setpont_c": 2.0}
    errors = refused(client.post("/v1/score", json={"events": [event]}), openapi)
    assert {"event": 0, "field": "setpont_c",
            "message": "unknown field; did you mean 'setpoint_c'?"} in errors
    assert {"event": 0, "field": "setpoint_c",
            "message": "field is required (send null for an unknown value)"} in errors
    # Optional fields too (the id here): case alone is enough to be a misspelling.
    event = {k: v for k, v in events[0].items() if k != "snapshot_id"} | {"Snapshot_ID": "a"}
    errors = refused(client.post("/v1/score", json={"events": [event]}), openapi)
    assert errors == [{"event": 0, "field": "Snapshot_ID",
                       "message": "unknown field; did you mean 'snapshot_id'?"}]


def test_unknown_fields_can_be_refused_by_setting(
    make_client: Callable[..., TestClient], events: list[dict]
) -> None:
    client = make_client(unknown_fields="reject")
    response = client.post("/v1/score", json={"events": [{**events[0], "store_id": "ST-01"}]})
    assert response.status_code == 422
    assert response.json()["errors"] == [{"event": 0, "field": "store_id",
                                          "message": "unknown field"}]


def test_every_bad_field_is_named(
    client: TestClient, openapi: OpenAPICheck, events: list[dict]
) -> None:
    first = {**events[0], "month": "May", "case_type": "igloo"}
    second = {k: v for k, v in events[1].items() if k != "month"} | {"mnth": 5}
    errors = refused(client.post("/v1/score", json={"events": [first, second]}), openapi)
    assert {(e["event"], e["field"]) for e in errors} == {(0, "month"), (1, "month"),
                                                          (1, "mnth")}
    # The category is checked after the JSON-level fields pass: fix those and it shows up.
    first["month"] = 5
    errors = refused(client.post("/v1/score", json={"events": [first]}), openapi)
    assert [(e["event"], e["field"]) for e in errors] == [(0, "case_type")]


def test_body_over_the_size_limit(
    make_client: Callable[..., TestClient], events: list[dict]
) -> None:
    client = make_client(max_body_bytes=4096)
    openapi = OpenAPICheck(client.get("/openapi.json").json())
    body = json.dumps({"events": events * 20}).encode()
    assert len(body) > 4096
    refused(post_raw(client, body), openapi, 413)

    def chunks() -> Iterator[bytes]:  # no Content-Length: the limit holds while reading
        for start in range(0, len(body), 1000):
            yield body[start:start + 1000]

    response = client.post("/v1/score", content=chunks(),
                           headers={"content-type": "application/json"})
    refused(response, openapi, 413)
    # Refused before routing, yet counted under the route it was sent to.
    text = client.get("/metrics").text
    assert metric(text, "causeline_http_requests_total", route="/v1/score", status="413") == 2


def test_malformed_json(client: TestClient, openapi: OpenAPICheck) -> None:
    refused(post_raw(client, b'{"events": [{"month": 5,'), openapi, 400)
    response = post_raw(client, b'{"events": [{"month": 5,')
    assert "EOF while parsing" in response.json()["detail"]  # the parser says where and why


def test_json_nested_too_deep(client: TestClient, openapi: OpenAPICheck) -> None:
    # Valid JSON, but a parser must bound its nesting (RFC 8259 section 9 lets it set limits).
    refused(post_raw(client, b'{"events": [' + b"[" * 300 + b"]" * 300 + b"]}"), openapi, 400)
    assert "recursion limit" in post_raw(client, b"[" * 300 + b"]" * 300).json()["detail"]


def test_byte_order_mark_is_ignored(client: TestClient, events: list[dict]) -> None:
    # RFC 8259 section 8.1: a parser may ignore a UTF-8 byte order mark, and some tools send one.
    body = b"\xef\xbb\xbf" + json.dumps({"events": events[:1]}).encode()
    assert post_raw(client, body).status_code == 200


def test_content_encoding_other_than_identity(
    client: TestClient, openapi: OpenAPICheck, events: list[dict]
) -> None:
    # RFC 9110 section 15.5.16: a content coding the server does not apply gets 415 and an
    # Accept-Encoding header; the body must never be scored as if it were not encoded.
    body = json.dumps({"events": events[:1]}).encode()
    for coding in ("gzip", "br"):
        response = client.post("/v1/score", content=body, headers={
            "content-type": "application/json", "content-encoding": coding})
        refused(response, openapi, 415)
        assert response.headers["accept-encoding"] == "identity"
    plain = client.post("/v1/score", content=body, headers={
        "content-type": "application/json", "content-encoding": "identity"})
    assert plain.status_code == 200


def test_empty_body(client: TestClient, openapi: OpenAPICheck) -> None:
    errors = refused(post_raw(client, b""), openapi)
    assert errors == [{"field": "body", "message": "field is required"}]


def test_body_that_is_not_json_media(client: TestClient, openapi: OpenAPICheck,
                                     events: list[dict]) -> None:
    # RFC 9110 section 15.5.16: 415 for a content type the resource does not take.
    response = client.post("/v1/score", content=json.dumps({"events": events[:1]}),
                           headers={"content-type": "text/plain"})
    refused(response, openapi, 415)
    # A JSON media type with parameters or a +json suffix is JSON (RFC 6839 section 3.1).
    for media in ("application/json; charset=utf-8", "application/vnd.causeline+json"):
        response = client.post("/v1/score", content=json.dumps({"events": events[:1]}),
                               headers={"content-type": media})
        assert response.status_code == 200, (media, response.text)


def test_body_of_the_wrong_shape(client: TestClient, openapi: OpenAPICheck,
                                 events: list[dict]) -> None:
    errors = refused(post_raw(client, b'[1, 2]'), openapi)
    assert errors == [{"field": "body", "message": "expected a JSON object"}]
    errors = refused(client.post("/v1/score", json={"events": [events[0], 1]}), openapi)
    assert errors == [{"event": 1, "field": "events", "message": "expected a JSON object"}]
    errors = refused(client.post("/v1/score", json={"events": events[:1], "extra": 1,
                                                    "model": 3}), openapi)
    assert {(e["field"], e["message"]) for e in errors} >= {("extra", "unknown field")}
    assert "model" in {e["field"] for e in errors}


def test_contributions_flag_takes_only_all(client: TestClient, openapi: OpenAPICheck,
                                          events: list[dict]) -> None:
    errors = refused(client.post("/v1/score?contributions=some", json={"events": events[:1]}),
                     openapi)
    assert [e["field"] for e in errors] == ["contributions"]


def test_openapi_declares_what_the_scoring_endpoints_read(client: TestClient) -> None:
    # The scoring endpoints read the body, flag and key by hand (causeline.service.api.reading); the
    # document must still say what they take, as it does for the endpoints FastAPI reads.
    spec = client.get("/openapi.json").json()
    schemes = set(spec["components"]["securitySchemes"])
    for path, model in (("/v1/score", "events"), ("/v1/score/timeline", "readings")):
        operation = spec["paths"][path]["post"]
        body = operation["requestBody"]["content"]["application/json"]["schema"]
        assert model in body["required"] and body["additionalProperties"] is False
        assert [p["name"] for p in operation["parameters"]] == ["contributions", "what-to-change"]
        assert {name for entry in operation["security"] for name in entry} == schemes
    models = spec["paths"]["/v1/models"]["get"]
    assert {name for entry in models["security"] for name in entry} == schemes


def test_too_many_events(client: TestClient, openapi: OpenAPICheck, events: list[dict]) -> None:
    errors = refused(client.post("/v1/score", json={"events": events * 5}), openapi, 413)
    assert errors == [{"field": "events", "message": "at most 50 events per request"}]


def test_no_events(client: TestClient, openapi: OpenAPICheck) -> None:
    errors = refused(client.post("/v1/score", json={"events": []}), openapi)
    assert [e["field"] for e in errors] == ["events"]


def test_unknown_model(client: TestClient, openapi: OpenAPICheck, events: list[dict]) -> None:
    errors = refused(client.post("/v1/score", json={"model": "x", "events": events}), openapi)
    assert errors[0]["field"] == "model" and "display-cases" in errors[0]["message"]


def test_unexpected_error_reaches_no_client(
    client: TestClient, openapi: OpenAPICheck, events: list[dict],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    def crash(jobs: Any) -> Any:
        raise RuntimeError("secret internals /srv/bundle")

    monkeypatch.setattr(api_scoring, "explain_jobs", crash)
    response = client.post("/v1/score", json={"events": events[:1]})
    assert response.status_code == 500
    body = openapi(response, "/v1/score")
    assert body == {"type": "about:blank", "title": "Internal Server Error", "status": 500}
    assert "secret" not in response.text and "Traceback" not in response.text


# ---------------------------------------------------------------- auth


def test_api_keys(make_client: Callable[..., TestClient], events: list[dict],
                  tmp_path: Path) -> None:
    keys = tmp_path / "keys.txt"
    keys.write_text(f"# one key a line\n{KEY}\n", "utf-8")
    client = make_client(api_keys="other-key", api_keys_file=keys)
    openapi = OpenAPICheck(client.get("/openapi.json").json())
    body = {"events": events[:1]}
    missing = client.post("/v1/score", json=body)
    assert missing.status_code == 401 and missing.headers["www-authenticate"].startswith("Bearer")
    openapi(missing, "/v1/score")
    wrong = client.post("/v1/score", json=body, headers={"Authorization": "Bearer nope"})
    assert wrong.status_code == 403
    openapi(wrong, "/v1/score")
    assert client.post("/v1/score", json=body,
                       headers={"Authorization": f"Bearer {KEY}"}).status_code == 200
    other = client.post("/v1/score", json=body, headers={"X-API-Key": "other-key"})
    assert other.status_code == 200
    assert client.get("/v1/models").status_code == 401
    assert client.get("/metrics").status_code == 401
    assert client.get("/v1/health/live").status_code == 200
    assert client.get("/v1/health/ready").status_code == 200
    assert client.post("/v1/admin/reload").status_code == 401
    assert client.post("/v1/admin/reload", headers={"X-API-Key": KEY}).status_code == 200


def test_api_key_beside_another_authorization_scheme(
    make_client: Callable[..., TestClient], events: list[dict]
) -> None:
    # A proxy in front may set Authorization: Basic (RFC 7617); that is not a key of ours and
    # must not hide a valid X-API-Key. Two different keys in one request must both be valid.
    client = make_client(api_keys=f"{KEY},second-key")
    body = {"events": events[:1]}

    def status(**headers: str) -> int:
        return client.post("/v1/score", json=body, headers=headers).status_code

    assert status(Authorization="Basic dXNlcjpwdw==", **{"X-API-Key": KEY}) == 200
    assert status(Authorization="Bearer ", **{"X-API-Key": KEY}) == 200
    assert status(Authorization="Basic dXNlcjpwdw==") == 401
    assert status(Authorization=f"Bearer {KEY}", **{"X-API-Key": "second-key"}) == 200
    assert status(Authorization=f"Bearer {KEY}", **{"X-API-Key": "nope"}) == 403
    assert status(Authorization="Bearer nope", **{"X-API-Key": KEY}) == 403


def test_admin_is_refused_when_auth_is_off_unless_allowed(
    make_client: Callable[..., TestClient],
) -> None:
    response = make_client().post("/v1/admin/reload")
    assert response.status_code == 403
    assert "CAUSELINE_API_KEYS" in response.json()["detail"]
    assert make_client(admin_without_keys=True).post("/v1/admin/reload").status_code == 200


# ---------------------------------------------------------------- models, health, metrics, docs


def test_model_description_follows_the_config(
    client: TestClient, openapi: OpenAPICheck, demo_bundle_path: Path
) -> None:
    config = yaml.safe_load(DEMO_CONFIG.read_text("utf-8"))
    listing = openapi(client.get("/v1/models"), "/v1/models", "get")
    assert listing["default"] == config["name"]
    response = client.get(f"/v1/models/{config['name']}")
    body = openapi(response, "/v1/models/{name}", "get")
    assert [f["name"] for f in body["features"]] == [f["name"] for f in config["features"]]
    assert set(body["fields"]["required"]) == {f["name"] for f in config["features"]}
    assert body["fields"]["optional"] == [config["id"], config["time"], config["entity"]]
    codes = [c["code"] for c in body["catalogue"]]
    assert codes[: len(config["reason_codes"])] == [c["code"] for c in config["reason_codes"]]
    firmware = next(f for f in body["features"] if f["name"] == "controller_firmware")
    assert "4.2.3" in firmware["categories"]
    assert 0 < body["threshold"] < 1 and "roc_auc" in body["metrics"]
    missing = client.get("/v1/models/nothing")
    assert missing.status_code == 404
    openapi(missing, "/v1/models/{name}", "get")


def test_health_and_docs(client: TestClient, openapi: OpenAPICheck) -> None:
    assert openapi(client.get("/v1/health/live"), "/v1/health/live", "get") == {"status": "ok"}
    ready = openapi(client.get("/v1/health/ready"), "/v1/health/ready", "get")
    assert ready["status"] == "ready" and ready["models"][0]["name"] == "display-cases"
    assert ready["prediction_log"]["status"] == "ok"
    docs = client.get("/docs")
    assert docs.status_code == 200 and "openapi.json" in docs.text
    assert client.get("/nowhere").headers["content-type"].startswith("application/problem+json")


def test_metrics_count_requests_events_and_reason_codes(
    make_client: Callable[..., TestClient], events: list[dict]
) -> None:
    client = make_client()
    results = client.post("/v1/score", json={"events": events}).json()["results"]
    client.post("/v1/score", json={"events": [{"month": "x"}]})
    text = client.get("/metrics").text
    assert metric(text, "causeline_events_scored_total") == len(events)
    codes = [reason["code"] for result in results for reason in result["reasons"]]
    assert codes
    for code in set(codes):
        value = metric(text, "causeline_reason_codes_issued_total", code=code)
        assert value == codes.count(code)
    assert metric(text, "causeline_http_requests_total", route="/v1/score", status="200") == 1
    assert metric(text, "causeline_http_requests_total", route="/v1/score", status="422") == 1
    assert metric(text, "causeline_http_request_seconds_count", route="/v1/score") == 2
    # One explanation call for the scored request (the refused one never reached the batcher).
    assert metric(text, "causeline_explain_batch_rows_count") == 1
    assert metric(text, "causeline_explain_batch_rows_sum") == len(events)


# ---------------------------------------------------------------- prediction log


def test_prediction_log_holds_every_scored_event(
    make_client: Callable[..., TestClient], events: list[dict], tmp_path: Path
) -> None:
    client = make_client()
    results = client.post("/v1/score", json={"events": events}).json()["results"]
    client.post("/v1/score", json={"events": [{**events[0], "case_type": "igloo"}]})
    client.__exit__(None, None, None)  # shutdown writes and fsyncs the queue
    log = read_prediction_log(tmp_path / "log")
    assert list(log["log_id"]) == [r["id"] for r in results]
    assert list(log["log_probability"]) == [r["probability"] for r in results]
    assert list(log["log_reasons"]) == [[x["code"] for x in r["reasons"]] for r in results]
    assert list(log["door_openings_per_h"]) == [e["door_openings_per_h"] for e in events]


def test_concurrent_requests_are_logged_and_counted_only_when_scored(
    make_client: Callable[..., TestClient], events: list[dict], tmp_path: Path
) -> None:
    # Concurrent requests may share one explanation call, and the service counts and logs per
    # call: a request refused there (an unknown category) must still be left out of both.
    client = make_client()
    bad = {**events[0], "case_type": "igloo"}
    bodies = [[bad] if position % 3 == 0 else [event] for position, event in enumerate(events)]
    with ThreadPoolExecutor(8) as pool:
        answers = list(pool.map(lambda body: client.post("/v1/score", json={"events": body}),
                                bodies))
    scored = [a.json()["results"][0] for a in answers if a.status_code == 200]
    assert sorted(a.status_code for a in answers) == sorted(
        422 if body == [bad] else 200 for body in bodies)
    text = client.get("/metrics").text
    assert metric(text, "causeline_events_scored_total") == len(scored)
    codes = [reason["code"] for result in scored for reason in result["reasons"]]
    assert sum(metric(text, "causeline_reason_codes_issued_total", code=code)
               for code in set(codes)) == len(codes)
    client.__exit__(None, None, None)
    log = read_prediction_log(tmp_path / "log")
    assert sorted(log["log_id"]) == sorted(result["id"] for result in scored)
    assert "igloo" not in set(log["case_type"])


def test_unwritable_prediction_log_keeps_scoring_and_shows_in_readiness(
    make_client: Callable[..., TestClient], events: list[dict], tmp_path: Path
) -> None:
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder", "utf-8")
    client = make_client(prediction_log=str(blocker / "predictions"))
    assert client.post("/v1/score", json={"events": events}).status_code == 200
    service = client.app.state.service
    service.log.stop()  # drains the queue: the failed write has happened when this returns
    ready = client.get("/v1/health/ready")
    assert ready.status_code == 200
    log = ready.json()["prediction_log"]
    assert log["status"] == "failing" and log["dropped"] == len(events)
    text = client.get("/metrics").text
    assert metric(text, "causeline_prediction_log_errors_total") >= 1
    dropped = metric(text, "causeline_prediction_log_dropped_records_total", reason="write failed")
    assert dropped == len(events)


def test_failing_log_fails_readiness_when_required(
    make_client: Callable[..., TestClient], events: list[dict], tmp_path: Path
) -> None:
    blocker = tmp_path / "a-file"
    blocker.write_text("", "utf-8")
    client = make_client(prediction_log=str(blocker / "x"), prediction_log_required=True)
    client.post("/v1/score", json={"events": events[:1]})
    client.app.state.service.log.stop()
    assert client.get("/v1/health/ready").status_code == 503


def test_full_log_queue_drops_and_counts(tmp_path: Path) -> None:
    metrics = Metrics()
    log = BackgroundLog(tmp_path / "log", metrics, capacity=3)
    record = {"model": "m", "event": {"x": 1}}
    assert log.submit([record, record])  # the thread is not started: nothing drains
    assert not log.submit([record, record])
    queued = metrics.exposition()[0].decode()
    assert metric(queued, "causeline_prediction_log_queue_records") == 2
    log.start()
    log.stop()
    assert (log.written, log.dropped) == (2, 2)
    text = metrics.exposition()[0].decode()
    assert metric(text, "causeline_prediction_log_dropped_records_total", reason="queue full") == 2
    assert metric(text, "causeline_prediction_log_records_total") == 2
    assert len(read_prediction_log(tmp_path / "log")) == 2
    assert metric(text, "causeline_prediction_log_queue_records") == 0


def test_metrics_show_recent_shares_and_mean_probability(
    make_client: Callable[..., TestClient], events: list[dict]
) -> None:
    client = make_client()
    results = client.post("/v1/score", json={"events": events}).json()["results"]
    text = client.get("/metrics").text
    assert metric(text, "causeline_recent_events") == len(events)
    mean = sum(result["probability"] for result in results) / len(results)
    assert metric(text, "causeline_recent_mean_probability") == pytest.approx(mean)
    codes = collections.Counter(r["code"] for result in results for r in result["reasons"])
    assert codes
    for code, count in codes.items():
        share = metric(text, "causeline_recent_reason_code_share", code=code)
        assert share == pytest.approx(count / len(events))


# ---------------------------------------------------------------- bundle swap


def test_reload_swaps_a_good_bundle_and_refuses_a_tampered_one(
    make_client: Callable[..., TestClient], events: list[dict], demo_bundle_path: Path,
    tmp_path: Path,
) -> None:
    live = tmp_path / "live"
    shutil.copytree(demo_bundle_path, live)
    client = make_client(bundle=live, api_keys=KEY)
    key = {"X-API-Key": KEY}
    old = client.get("/v1/models", headers=key).json()["models"][0]["version"]

    shutil.rmtree(live)
    rewrite_bundle(demo_bundle_path, live, version="2.0-test")
    swapped = client.post("/v1/admin/reload", headers=key)
    assert swapped.status_code == 200
    assert swapped.json() == {"models": [{"name": "display-cases", "version": "2.0-test"}],
                              "previous": [{"name": "display-cases", "version": old}]}
    scored = client.post("/v1/score", json={"events": events[:1]}, headers=key).json()
    assert scored["model"]["version"] == "2.0-test"

    tamper(live)
    refused = client.post("/v1/admin/reload", headers=key)
    assert refused.status_code == 409 and "checksum" in refused.json()["detail"]
    still = client.post("/v1/score", json={"events": events[:1]}, headers=key)
    assert still.status_code == 200 and still.json()["model"]["version"] == "2.0-test"
    ready = client.get("/v1/health/ready").json()
    assert ready["status"] == "ready" and ready["last_reload"]["ok"] is False
    assert "checksum" in ready["last_reload"]["error"]
    assert ready["models"] == [{"name": "display-cases", "version": "2.0-test"}]
    text = client.get("/metrics", headers=key).text
    assert metric(text, "causeline_bundle_load_failures_total") == 1
    assert metric(text, "causeline_bundle_reloads_total") == 1


def test_served_models_stay_out_of_the_collectors_passes(
    make_client: Callable[..., TestClient],
) -> None:
    # gc.get_objects() lists the collector's generations, never the frozen objects.
    def collected(obj: object) -> bool:
        return any(o is obj for o in gc.get_objects())

    client = make_client(admin_without_keys=True)
    first, _ = client.app.state.service.current.pick(None)
    assert not collected(first.explainer) and not collected(first.bundle.spec)
    old = weakref.ref(first.explainer)
    del first
    assert client.post("/v1/admin/reload").status_code == 200
    second, _ = client.app.state.service.current.pick(None)
    assert not collected(second.explainer)
    assert old() is None  # the swapped-out set is freed, frozen or not


def test_request_in_flight_finishes_on_the_bundle_it_started_with(
    make_client: Callable[..., TestClient], events: list[dict], demo_bundle_path: Path,
    tmp_path: Path,
) -> None:
    live = tmp_path / "live"
    shutil.copytree(demo_bundle_path, live)
    client = make_client(bundle=live, admin_without_keys=True)
    model, _ = client.app.state.service.current.pick(None)
    started, release = threading.Event(), threading.Event()
    explain = model.explainer.explain_features

    def slow(matrix: Any, ids: list[str]) -> Any:
        started.set()
        release.wait(60)
        return explain(matrix, ids)

    model.explainer.explain_features = slow
    answer: list[httpx.Response] = []
    # More events than are explained on the event loop itself (INLINE_ROWS), so the slow
    # explanation runs on a thread and the loop stays free to take the reload meanwhile.
    many = (events * (api_scoring.INLINE_ROWS + 1))[:api_scoring.INLINE_ROWS + 1]
    worker = threading.Thread(
        target=lambda: answer.append(client.post("/v1/score", json={"events": many}))
    )
    worker.start()
    assert started.wait(60)
    shutil.rmtree(live)
    rewrite_bundle(demo_bundle_path, live, version="3.0-test")
    assert client.post("/v1/admin/reload").status_code == 200
    assert not release.is_set()  # the reload was taken while the request was in flight
    release.set()
    worker.join(60)
    assert answer[0].json()["model"]["version"] == model.version != "3.0-test"
    after = client.post("/v1/score", json={"events": events[:1]}).json()
    assert after["model"]["version"] == "3.0-test"


def test_folder_of_bundles_served_side_by_side(
    make_client: Callable[..., TestClient], events: list[dict], demo_bundle_path: Path,
    tmp_path: Path,
) -> None:
    folder = tmp_path / "bundles"
    shutil.copytree(demo_bundle_path, folder / "a")
    other = json.loads((demo_bundle_path / MANIFEST).read_text("utf-8"))
    other["name"] = "display-cases-b"
    rewrite_bundle(demo_bundle_path, folder / "b", name="display-cases-b", version="b1")
    client = make_client(bundle=folder)
    listing = client.get("/v1/models").json()
    assert listing["default"] is None
    assert sorted(m["name"] for m in listing["models"]) == ["display-cases", "display-cases-b"]
    unnamed = client.post("/v1/score", json={"events": events[:1]})
    assert unnamed.status_code == 422 and unnamed.json()["errors"][0]["field"] == "model"
    assert unnamed.json()["errors"][0]["message"] == "name a model: display-cases, display-cases-b"
    named = client.post("/v1/score", json={"model": "display-cases-b", "events": events[:1]})
    assert named.json()["model"] == {"name": "display-cases-b", "version": "b1"}


def test_the_document_describes_each_served_models_event(
    client: TestClient, events: list[dict]
) -> None:
    # Checked with jsonschema (the reference JSON Schema validator) against the published
    # document: a generated client knows every field, and what the document calls valid is
    # what the service scores.
    spec = client.get("/openapi.json").json()
    operation = spec["paths"]["/v1/score"]["post"]
    request = {**operation["requestBody"]["content"]["application/json"]["schema"],
               "components": spec["components"]}
    valid = jsonschema.Draft202012Validator(request)
    assert not valid.is_valid({"events": [{}]})
    assert valid.is_valid({"events": events[:2]})
    assert not valid.is_valid({"events": [{**events[0], "case_type": "igloo"}]})
    assert not valid.is_valid({"events": [{**events[0], "month": "May"}]})
    assert valid.is_valid({"events": [{**events[0], "store_id": "ST-01"}]})  # passed over
    assert client.post("/v1/score", json={"events": [{}]}).status_code == 422
    # The same fields, types and categories as GET /v1/models/{name} gives.
    described = client.get("/v1/models/display-cases").json()
    event = spec["components"]["schemas"]["Event-display-cases"]
    assert event["required"] == described["fields"]["required"]
    assert set(event["properties"]) == set(described["fields"]["required"]) | set(
        described["fields"]["optional"])
    for feature in described["features"]:
        if feature["field"] and feature["categories"]:
            assert event["properties"][feature["field"]]["enum"][:-1] == feature["categories"]


def test_the_document_follows_a_reload(
    make_client: Callable[..., TestClient], tmp_path: Path, demo_bundle_path: Path
) -> None:
    # Strict mode says so in the document too; a reload that serves other fields shows them.
    client = make_client(unknown_fields="reject")
    event = client.get("/openapi.json").json()["components"]["schemas"]["Event-display-cases"]
    assert event["additionalProperties"] is False
    folder = client.app.state.service.settings.bundle
    assert folder == demo_bundle_path
    before = client.get("/openapi.json").json()
    client.app.state.service.current = None  # as before the first load
    assert "Event-display-cases" not in client.get("/openapi.json").json()["components"][
        "schemas"]
    client.app.state.service.reload()
    assert client.get("/openapi.json").json() == before


def test_what_to_change_adds_the_searchs_action_to_each_flagged_event(
    client: TestClient, openapi: OpenAPICheck, events: list[dict], demo_bundle_path: Path
) -> None:
    # The same action as the search run directly on the event's feature row (the exact
    # interval search is checked against brute force in tests/actions), with the reason codes
    # the model gives the changed event.
    from causeline.service.actions.search import ActionFinder
    from causeline.service.bundle.load import load_bundle
    from causeline.service.explain.explainer import Explainer

    body = openapi(client.post("/v1/score?what-to-change=2", json={"events": events}),
                   "/v1/score")
    plain = openapi(client.post("/v1/score", json={"events": events}), "/v1/score")
    assert all("what_to_change" not in r or r["what_to_change"] is None for r in plain["results"])
    bundle = load_bundle(demo_bundle_path)
    finder = ActionFinder(bundle, 2)
    explainer = Explainer(bundle)
    rows = explainer.explain(pd.DataFrame(events)).features.values
    flagged = 0
    for row, result in zip(rows, body["results"], strict=True):
        record = result["what_to_change"]
        if not result["decision"]:
            assert record is None
            continue
        flagged += 1
        action = finder.find(row)
        assert [(c["feature"], c["to"]) for c in record["changes"]] == [
            (c.feature, c.after) for c in action.changes]
        assert record["probability_after"] == pytest.approx(action.probability_after)
        if record["changes"]:
            after = explainer.reasons_of(action.apply(row)[None, :])[0]
            assert record["reason_codes_after"] == [r.code for r in after]
    assert flagged
    errors = refused(client.post("/v1/score?what-to-change=7", json={"events": events}), openapi)
    assert errors == [{"field": "what-to-change",
                       "message": "the most features to change, 1 to 4 (empty: 2)"}]
