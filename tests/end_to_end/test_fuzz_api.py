"""API fuzzing from the service's own OpenAPI document (schemathesis, in-process over ASGI).

Every operation gets generated requests, valid and invalid (wrong types, missing and unknown
fields, odd strings, huge numbers), with a key and without one. Whatever arrives, the answer is
never a 5xx, always one the document declares with the declared media type and schema, and every
error is RFC 9457 problem details (``application/problem+json`` with ``type``, ``title`` and a
``status`` equal to the HTTP status).
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
import schemathesis
from fastapi import FastAPI
from hypothesis import HealthCheck, given, settings
from hypothesis.errors import Unsatisfiable
from schemathesis import GenerationMode
from schemathesis.specs.openapi.checks import positive_data_acceptance

from causeline.service.api.app import create_app
from causeline.service.api.settings import Settings
from causeline.service.bundle.load import Bundle
from tests.api.test_api import KEY

PROBLEM = "application/problem+json"
OPEN = {"/v1/health/live", "/v1/health/ready"}  # probes never need a key
NO_INPUT = {*OPEN, "/v1/models", "/v1/admin/reload", "/metrics"}


@schemathesis.check
def problem_details(ctx: Any, response: Any, case: Any) -> bool | None:
    """Every error is RFC 9457 problem details whose ``status`` matches the HTTP status."""
    if response.status_code < 400:
        return None
    media = response.headers.get("content-type", [""])
    media = media[0] if isinstance(media, list) else media
    assert media.startswith(PROBLEM), f"{response.status_code} answered as {media!r}"
    body = response.json()
    assert isinstance(body, dict), "problem details must be a JSON object"
    for member in ("type", "title", "status"):
        assert member in body, f"problem details without {member!r}"
    assert body["status"] == response.status_code
    assert "Traceback" not in response.text
    return True


@pytest.fixture
def fuzzed_app(demo_bundle: Bundle, tmp_path: Path) -> Iterator[FastAPI]:
    # One app per test: an app's lifespan (bundle load, log thread) runs once, as under uvicorn.
    log = tmp_path / "log"
    # Small limits, so generated bodies also reach the size and batch limits.
    yield create_app(Settings(
        bundle=Path(demo_bundle.path), prediction_log=str(log), api_keys=KEY, max_events=5,
        max_body_bytes=8192, access_log=False,
    ))


@pytest.fixture
def api_schema(fuzzed_app: FastAPI) -> Any:
    # An invalid request may be refused for its size (413) before its content is read.
    config = schemathesis.Config.from_dict({"checks": {"negative_data_rejection": {
        "expected-statuses": ["400", "401", "403", "404", "405", "409", "413", "415", "422"],
    }}})
    return schemathesis.openapi.from_asgi("/openapi.json", fuzzed_app, config=config)


# Hypothesis drives schemathesis's strategies directly: its pytest plugin's lazy loader does not
# run under the pytest this project uses.
@pytest.mark.parametrize("mode", [GenerationMode.POSITIVE, GenerationMode.NEGATIVE],
                         ids=["schema-valid", "schema-invalid"])
def test_every_operation_answers_within_its_contract(api_schema: Any, mode: GenerationMode) -> None:
    operations = [result.ok() for result in api_schema.get_all_operations()]
    assert {op.path for op in operations} >= {"/v1/score", "/v1/models", "/v1/models/{name}",
                                              "/v1/health/live", "/v1/health/ready",
                                              "/v1/admin/reload", "/metrics"}
    for operation in operations:
        # A reload reloads the bundle (slow) and takes no input: a few examples say it all.
        examples = 5 if operation.path == "/v1/admin/reload" else 25
        try:
            _fuzz(operation.as_strategy(generation_mode=mode), examples)
        except Unsatisfiable:
            # No invalid request exists where there is nothing to get wrong: no parameters and
            # no body.
            assert mode is GenerationMode.NEGATIVE and operation.path in NO_INPUT


def _fuzz(strategy: Any, examples: int) -> None:
    @given(case=strategy)
    @settings(max_examples=examples, deadline=None, derandomize=True, database=None,
              suppress_health_check=list(HealthCheck))
    def check(case: Any) -> None:
        # With a valid key (both ways of sending one, so a generated credential cannot stand in
        # for it), and with whatever credentials were generated: those must get 401 or 403.
        keyed = {"Authorization": f"Bearer {KEY}", "X-API-Key": KEY}
        for headers in (keyed, None):
            response = case.call(headers=headers)
            # The document describes each served model's event fields, so an event it calls
            # valid must be scored (a body past the size limit aside). The other operations'
            # valid requests may still not fit the bundle (a timeline request to a bundle
            # trained from a table), so the check applies to /v1/score alone.
            accept = headers is not None and case.operation.path == "/v1/score" \
                and response.status_code != 413
            case.validate_response(
                response, headers=headers, additional_checks=[problem_details],
                excluded_checks=[] if accept else [positive_data_acceptance],
            )
            assert response.status_code < 500, response.text
            if headers is None and case.operation.path not in OPEN:
                # Never served without a key (a body may be refused for its size or syntax
                # before the key is looked at).
                assert response.status_code >= 400, response.text

    check()
