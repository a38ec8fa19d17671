"""The real server: ``python -m causeline serve`` on a free loopback port, spoken to over HTTP."""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pandas as pd
import pytest

from causeline.service.bundle.load import Bundle
from causeline.service.files.predlog import read_prediction_log
from tests.api.test_api import KEY, OpenAPICheck, demo_events, rewrite_bundle, tamper


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def wait_until(check: Any, seconds: float = 60.0) -> Any:
    """Poll ``check`` until it returns something true (a wait, not a timing assertion)."""
    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        try:
            value = check()
        except httpx.TransportError:
            value = None
        if value:
            return value
        time.sleep(0.1)
    raise AssertionError("gave up waiting")


@pytest.fixture(scope="module")
def server(
    demo_bundle: Bundle, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[dict[str, Any]]:
    folder = tmp_path_factory.mktemp("server")
    live = folder / "bundle"
    shutil.copytree(demo_bundle.path, live)
    port = free_port()
    env = {**os.environ, "CAUSELINE_API_KEYS": KEY,
           "CAUSELINE_PREDICTION_LOG": str(folder / "log"),
           "CAUSELINE_PREDICTION_LOG_FSYNC_SECONDS": "0.2", "CAUSELINE_ACCESS_LOG": "0"}
    process = subprocess.Popen(
        [sys.executable, "-m", "causeline", "serve", "--bundle", str(live), "--port", str(port)],
        env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )
    base = f"http://127.0.0.1:{port}"
    try:
        with httpx.Client(base_url=base, timeout=30) as client:
            if not _ready(client, process):
                raise AssertionError(process.stdout.read() if process.stdout else "no output")
            yield {"client": client, "process": process, "live": live, "folder": folder}
    finally:
        if process.poll() is None:
            process.send_signal(signal.SIGTERM)
            process.wait(30)


def _ready(client: httpx.Client, process: subprocess.Popen[str]) -> bool:
    def check() -> bool:
        if process.poll() is not None:
            return True
        return client.get("/v1/health/ready").status_code == 200

    wait_until(check)
    return process.poll() is None


def test_real_server_scores_refuses_and_swaps_bundles(
    server: dict[str, Any], demo_table: pd.DataFrame, demo_bundle: Bundle
) -> None:
    demo_bundle_path = demo_bundle.path
    client: httpx.Client = server["client"]
    openapi = OpenAPICheck(client.get("/openapi.json").json())
    events = demo_events(demo_table, demo_bundle_path, rows=5)
    key = {"Authorization": f"Bearer {KEY}"}

    assert client.post("/v1/score", json={"events": events}).status_code == 401
    scored = client.post("/v1/score", json={"events": events}, headers=key)
    body = openapi(scored, "/v1/score")
    assert [r["id"] for r in body["results"]] == [e["snapshot_id"] for e in events]
    old = body["model"]["version"]

    broken = {**events[0], "month": "June", "case_type": None, "extra": 1}
    refused = client.post("/v1/score", json={"events": [broken]}, headers=key)
    assert refused.status_code == 422
    # A field the model does not use is scored past (named in ignored_fields), not refused.
    assert {e["field"] for e in openapi(refused, "/v1/score")["errors"]} == {"month"}
    malformed = client.post("/v1/score", content=b"{", headers={**key,
                            "content-type": "application/json"})
    assert malformed.status_code == 400 and "Traceback" not in malformed.text

    # SIGHUP swaps in a changed bundle; a tampered one is refused and the old keeps serving.
    live: Path = server["live"]
    shutil.rmtree(live)
    rewrite_bundle(demo_bundle_path, live, version="hup-1")
    server["process"].send_signal(signal.SIGHUP)
    wait_until(lambda: client.get("/v1/health/ready").json()["models"][0]["version"] == "hup-1")
    tamper(live)
    server["process"].send_signal(signal.SIGHUP)
    ready = wait_until(lambda: (r := client.get("/v1/health/ready").json())["last_reload"]["ok"]
                       is False and r)
    assert ready["models"][0]["version"] == "hup-1" and old != "hup-1"
    again = client.post("/v1/score", json={"events": events[:1]}, headers=key).json()
    assert again["model"]["version"] == "hup-1"

    # A clean stop writes the prediction log out (uvicorn re-raises SIGTERM once it has stopped).
    process: subprocess.Popen[str] = server["process"]
    process.send_signal(signal.SIGTERM)
    assert process.wait(30) in (0, -signal.SIGTERM)
    output = process.stdout.read() if process.stdout else ""
    assert "Traceback" not in output and "refused" in output
    log = read_prediction_log(server["folder"] / "log")
    assert list(log["log_id"]) == [e["snapshot_id"] for e in events] + [events[0]["snapshot_id"]]
    assert list(log["log_version"]) == [old] * len(events) + ["hup-1"]


def test_serve_refuses_a_tampered_bundle_with_one_line(
    demo_bundle: Bundle, tmp_path: Path
) -> None:
    bundle = tmp_path / "bundle"
    shutil.copytree(demo_bundle.path, bundle)
    tamper(bundle)
    result = subprocess.run(
        [sys.executable, "-m", "causeline", "serve", "--bundle", str(bundle),
         "--port", str(free_port())],
        capture_output=True, text=True, timeout=120,
    )
    assert result.returncode == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "checksum" in lines[0], result.stderr
