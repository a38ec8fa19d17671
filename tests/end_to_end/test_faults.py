"""Faults and hostile input: bundle swaps under load, broken bundles, a full disk, a killed batch
job, malformed batch rows, and bundles or configs that try to smuggle code.

Already covered elsewhere (not repeated here): a tampered model refused on reload in-process
(tests/api/test_api.py::test_reload_swaps_a_good_bundle_and_refuses_a_tampered_one) and by
SIGHUP on a real server (tests/end_to_end/test_server.py); an unwritable log folder and the
required-log readiness rule (tests/api/test_api.py); API keys, body-size and batch limits
(tests/api/test_api.py); a failed root-cause run leaving the previous folder intact
(tests/rootcause/test_outputs.py); CSV injection in explain and root-cause outputs
(tests/training/test_cli.py, tests/rootcause/test_outputs.py); YAML tags refused by ``train``
(tests/training/test_cli.py); expressions with calls or attribute access refused by the parser
(tests/spec/test_expressions.py).
"""

from __future__ import annotations

import contextlib
import csv
import errno
import json
import os
import pickle
import shutil
import signal
import subprocess
import sys
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pandas as pd
import pytest
from fastapi.testclient import TestClient

from causeline.cli import main as causeline
from causeline.service.api.app import create_app
from causeline.service.api.settings import Settings
from causeline.service.bundle.load import Bundle, load_bundle
from causeline.service.bundle.manifest import CHECKSUMS, MANIFEST, MODEL
from causeline.service.errors import BundleError
from causeline.service.files import predlog
from causeline.service.files.checksum import checksum_text
from causeline.service.rootcause.job import EVENT_GROUPS, GROUPS, REJECTS, REPORT
from causeline.service.rootcause.tracking import SUMMARY
from tests.api.test_api import KEY, demo_events, metric, rewrite_bundle, tamper
from tests.conftest import DEMO_CONFIG
from tests.end_to_end.test_server import free_port, wait_until

AUTH = {"X-API-Key": KEY}
OUTPUTS = {GROUPS, EVENT_GROUPS, REPORT, SUMMARY, REJECTS}


# ---------------------------------------------------------------- helpers


def point(link: Path, target: Path) -> None:
    """Make ``link`` name ``target`` in one rename, the way an operator swaps bundles safely."""
    temporary = link.with_name(link.name + ".new")
    temporary.unlink(missing_ok=True)
    temporary.symlink_to(target)
    os.replace(temporary, link)


def rechecksum(bundle: Path, extra: tuple[str, ...] = ()) -> None:
    """Make the checksum file match the bundle's files again (a forger's move)."""
    names = [line.split("  ", 1)[1] for line in (bundle / CHECKSUMS).read_text().splitlines()]
    (bundle / CHECKSUMS).write_text(checksum_text(bundle, sorted({*names, *extra})), "utf-8")


@contextlib.contextmanager
def served(bundle: Path, folder: Path) -> Iterator[tuple[httpx.Client, subprocess.Popen[str]]]:
    """``python -m causeline serve`` on a free loopback port, with keys on; stopped after."""
    port = free_port()
    env = {**os.environ, "CAUSELINE_API_KEYS": KEY, "CAUSELINE_ACCESS_LOG": "0",
           "CAUSELINE_PREDICTION_LOG": str(folder / "log")}
    process = subprocess.Popen(
        [sys.executable, "-m", "causeline", "serve", "--bundle", str(bundle), "--port",
         str(port)], env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True,
    )
    try:
        with httpx.Client(base_url=f"http://127.0.0.1:{port}", timeout=30) as client:
            wait_until(lambda: process.poll() is not None
                       or client.get("/v1/health/ready").status_code == 200)
            assert process.poll() is None, process.stdout.read() if process.stdout else ""
            yield client, process
    finally:
        if process.poll() is None:
            process.send_signal(signal.SIGTERM)
            process.wait(30)


def versions(folder: Path, source: Path, *names: str) -> dict[str, Path]:
    """Copies of ``source`` that differ only in their manifest version."""
    return {name: rewrite_bundle(source, folder / name, version=name) for name in names}


# ---------------------------------------------------------------- bundle swap under load


def test_bundle_swapped_during_load_fails_no_request(
    demo_bundle: Bundle, demo_table: pd.DataFrame, tmp_path: Path
) -> None:
    copies = versions(tmp_path / "versions", demo_bundle.path, "swap-1", "swap-2", "swap-3")
    tamper(copies["swap-3"])
    live = tmp_path / "live"
    point(live, copies["swap-1"])
    events = demo_events(demo_table, demo_bundle.path, rows=8)
    answers: list[tuple[int, str | None]] = []
    failures: list[str] = []
    stop = threading.Event()

    def load(port_url: str, offset: int) -> None:
        # Bounded: at most 400 requests per thread, and it stops when told to.
        with httpx.Client(base_url=port_url, timeout=30) as session:
            for sent in range(400):
                if stop.is_set():
                    return
                event = events[(offset + sent) % len(events)]
                try:
                    response = session.post("/v1/score", json={"events": [event]}, headers=AUTH)
                except httpx.HTTPError as exc:
                    failures.append(f"{type(exc).__name__}: {exc}")
                    continue
                version = response.json().get("model", {}).get("version")
                answers.append((response.status_code, version))

    with served(live, tmp_path) as (client, process):
        threads = [threading.Thread(target=load, args=(str(client.base_url), i))
                   for i in range(4)]
        for thread in threads:
            thread.start()
        try:
            wait_until(lambda: len(answers) >= 40)
            point(live, copies["swap-2"])
            swapped = client.post("/v1/admin/reload", headers=AUTH)
            assert swapped.status_code == 200, swapped.text
            seen = len(answers)
            wait_until(lambda: len(answers) >= seen + 40)
            point(live, copies["swap-1"])
            process.send_signal(signal.SIGHUP)
            wait_until(lambda: client.get("/v1/health/ready").json()["models"][0]["version"]
                       == "swap-1")
            point(live, copies["swap-3"])  # tampered: refused while the load goes on
            refused = client.post("/v1/admin/reload", headers=AUTH)
            assert refused.status_code == 409, refused.text
            seen = len(answers)
            wait_until(lambda: len(answers) >= seen + 40)
        finally:
            stop.set()
            for thread in threads:
                thread.join(60)
        text = client.get("/metrics", headers=AUTH).text
        ready = client.get("/v1/health/ready").json()

    assert failures == []
    assert {status for status, _ in answers} == {200}
    assert {version for _, version in answers} == {"swap-1", "swap-2"}
    assert answers[-1][1] == "swap-1"  # the tampered bundle never served
    assert ready["last_reload"]["ok"] is False and "checksum" in ready["last_reload"]["error"]
    assert metric(text, "causeline_bundle_reloads_total") == 2
    assert metric(text, "causeline_bundle_load_failures_total") == 1
    assert metric(text, "causeline_http_requests_total", route="/v1/score", status="200") == len(
        answers)


# ---------------------------------------------------------------- broken bundles


def _truncate(file: Path, keep: float) -> None:
    data = file.read_bytes()
    file.write_bytes(data[: int(len(data) * keep)])


def _breakages() -> list[tuple[str, Any, str]]:
    """(name, how to break a bundle copy, words the refusal must contain)."""

    def truncated_model(bundle: Path) -> None:
        _truncate(bundle / MODEL, 0.5)

    def truncated_model_rechecksummed(bundle: Path) -> None:
        # LightGBM's own parser aborts the process on a cut-off model; load_bundle must not
        # hand it one even when the checksums were made to match.
        _truncate(bundle / MODEL, 0.999)
        rechecksum(bundle)

    def truncated_manifest_rechecksummed(bundle: Path) -> None:
        _truncate(bundle / MANIFEST, 0.7)
        rechecksum(bundle)

    def missing_model(bundle: Path) -> None:
        (bundle / MODEL).unlink()

    def expression_with_attribute_access(bundle: Path) -> None:
        _set_expression(bundle, "case_age_years.__class__")

    def expression_with_a_call(bundle: Path) -> None:
        _set_expression(bundle, "__import__('os').getpid()")

    return [
        ("tampered", tamper, "checksum"),
        ("truncated", truncated_model, "checksum"),
        ("truncated, checksums forged", truncated_model_rechecksummed, "cut short"),
        ("manifest cut, checksums forged", truncated_manifest_rechecksummed, "not valid JSON"),
        ("missing model", missing_model, "missing"),
        ("attribute access", expression_with_attribute_access, "attribute access"),
        ("a call", expression_with_a_call, "function call"),
    ]


def _set_expression(bundle: Path, expr: str) -> None:
    """Turn the first feature into a derived one with ``expr``, checksums forged to match."""
    raw = json.loads((bundle / MANIFEST).read_text("utf-8"))
    feature = raw["dataset"]["features"][0]
    feature.pop("column", None)
    feature["expr"] = expr
    (bundle / MANIFEST).write_text(json.dumps(raw), "utf-8")
    rechecksum(bundle)


@pytest.mark.parametrize(("name", "breakage", "words"), _breakages(),
                         ids=[name for name, _, _ in _breakages()])
def test_broken_bundle_is_refused_on_load(
    demo_bundle: Bundle, tmp_path: Path, name: str, breakage: Any, words: str
) -> None:
    copy = tmp_path / "copy"
    shutil.copytree(demo_bundle.path, copy)
    breakage(copy)
    with pytest.raises(BundleError, match=words):
        load_bundle(copy)


def test_broken_bundles_are_refused_by_a_real_server_and_the_old_keeps_serving(
    demo_bundle: Bundle, demo_table: pd.DataFrame, tmp_path: Path
) -> None:
    good = versions(tmp_path / "versions", demo_bundle.path, "good-1", "good-2")
    live = tmp_path / "live"
    point(live, good["good-1"])
    events = demo_events(demo_table, demo_bundle.path, rows=2)
    breakages = _breakages()
    with served(live, tmp_path) as (client, _):
        for number, (name, breakage, words) in enumerate(breakages, start=1):
            broken = tmp_path / "broken" / str(number)
            shutil.copytree(good["good-2"], broken)
            breakage(broken)
            point(live, broken)
            refused = client.post("/v1/admin/reload", headers=AUTH)
            assert refused.status_code == 409, (name, refused.text)
            assert refused.headers["content-type"].startswith("application/problem+json")
            assert words in refused.json()["detail"], name
            ready = client.get("/v1/health/ready")
            assert ready.status_code == 200  # the old bundle still serves, so still ready
            body = ready.json()
            assert body["last_reload"]["ok"] is False and words in body["last_reload"]["error"]
            assert body["last_reload"]["failures"] == number
            scored = client.post("/v1/score", json={"events": events}, headers=AUTH)
            assert scored.status_code == 200 and scored.json()["model"]["version"] == "good-1"
        text = client.get("/metrics", headers=AUTH).text
        assert metric(text, "causeline_bundle_load_failures_total") == len(breakages)
        assert metric(text, "causeline_model_info", version="good-1") == 1
        point(live, good["good-2"])
        assert client.post("/v1/admin/reload", headers=AUTH).status_code == 200
        assert client.get("/v1/health/ready").json()["last_reload"]["ok"] is True


# ---------------------------------------------------------------- a full disk


class _FullDisk:
    """A segment file whose writes fail as they do on a full file system."""

    def write(self, text: str) -> int:
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    def flush(self) -> None:
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    def fileno(self) -> int:
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    def tell(self) -> int:
        return 0

    def close(self) -> None:
        pass


@pytest.mark.parametrize("required", [False, True])
def test_full_disk_keeps_scoring_and_shows_in_health_and_metrics(
    demo_bundle: Bundle, demo_table: pd.DataFrame, tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch, required: bool,
) -> None:
    # The documented rule (README, "Prediction log"): scoring goes on, the records are dropped
    # and counted, the log shows as failing; readiness fails only when the log is required.
    events = demo_events(demo_table, demo_bundle.path, rows=6)
    settings = Settings(bundle=demo_bundle.path, prediction_log=str(tmp_path / "log"),
                        prediction_log_fsync_seconds=0.05, prediction_log_required=required,
                        access_log=False)
    monkeypatch.setattr(predlog.PredictionLogWriter, "_current", lambda self: _FullDisk())
    with TestClient(create_app(settings), raise_server_exceptions=False) as client:
        log = client.app.state.service.log
        scored = client.post("/v1/score", json={"events": events})
        assert scored.status_code == 200 and len(scored.json()["results"]) == len(events)
        wait_until(lambda: log.failing)
        ready = client.get("/v1/health/ready")
        assert ready.status_code == (503 if required else 200)
        status = ready.json()["prediction_log"]
        assert status["status"] == "failing" and "No space left" in status["error"]
        assert status["dropped"] == len(events)
        assert client.get("/v1/health/live").status_code == 200
        text = client.get("/metrics").text
        assert metric(text, "causeline_prediction_log_errors_total") >= 1
        assert metric(text, "causeline_prediction_log_dropped_records_total",
                      reason="write failed") == len(events)

        monkeypatch.undo()  # space is freed: the next batch is written to a fresh segment
        again = client.post("/v1/score", json={"events": events[:2]})
        assert again.status_code == 200
        wait_until(lambda: not log.failing and log.written == 2)
        assert client.get("/v1/health/ready").status_code == 200
    logged = predlog.read_prediction_log(tmp_path / "log")
    assert list(logged["log_id"]) == [e["snapshot_id"] for e in events[:2]]


# ---------------------------------------------------------------- the batch job killed mid-run


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


def test_rootcause_killed_mid_run_leaves_previous_outputs_and_rerun_completes(
    demo_bundle: Bundle, demo_parquet: Path, demo_table: pd.DataFrame, tmp_path: Path
) -> None:
    work = tmp_path / "work"
    out = work / "rc"
    march = ["--since", "2025-03-01", "--until", "2025-04-01"]
    command = [sys.executable, "-m", "causeline", "rootcause", "--bundle", str(demo_bundle.path),
               "--events", str(demo_parquet), "--out", str(out)]
    assert causeline(command[3:] + march) == 0
    before, listing = _snapshot(out), sorted(p.name for p in work.iterdir())
    assert set(before) == OUTPUTS

    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                               text=True)
    assert process.stderr is not None
    try:
        for line in process.stderr:
            if "step 4/" in line:  # clustering: well before anything is written
                process.kill()
                break
    finally:
        process.kill()
        process.wait(60)
    assert process.returncode == -signal.SIGKILL
    assert _snapshot(out) == before  # byte for byte
    assert sorted(p.name for p in work.iterdir()) == listing  # no stray staging folder

    rerun = subprocess.run(command, capture_output=True, text=True, timeout=600)
    assert rerun.returncode == 0, rerun.stderr
    assert set(_snapshot(out)) == OUTPUTS
    summary = json.loads((out / SUMMARY).read_text("utf-8"))
    events = int(demo_table["went_warm_24h"].sum())
    assert summary["counts"]["events"] == events and summary["window"]["since"] is None
    assert len(pd.read_csv(out / EVENT_GROUPS)) == events
    assert "</html>" in (out / REPORT).read_text("utf-8")
    assert sorted(p.name for p in work.iterdir()) == listing


# ---------------------------------------------------------------- malformed rows in batch input


@pytest.fixture(scope="module")
def march(demo_table: pd.DataFrame) -> pd.DataFrame:
    return demo_table[demo_table["snapshot_time"].str.startswith("2025-03")].reset_index(
        drop=True)


def _dirty_csv(march: pd.DataFrame, path: Path) -> dict[int, str]:
    """March as CSV with one fault of each kind; {line number: original id} of the bad lines."""
    events = march.index[march["went_warm_24h"] == 1]
    table = march.astype({"month": object, "went_warm_24h": object})
    table.loc[events[0], "month"] = "June"  # wrong type in a number column
    table.loc[events[1], "went_warm_24h"] = "maybe"  # a label that is not 0/1
    table.loc[events[2], "snapshot_id"] = '=HYPERLINK("http://example.invalid")'
    table.loc[events[2], "case_type"] = "igloo"  # an unknown category, in a formula-id row
    table.to_csv(path, index=False)
    lines = path.read_bytes().split(b"\n")
    # Line numbers: the header is line 1, so table row r is line r + 2.
    broken, surplus, latin1 = (int(events[i]) + 2 for i in (3, 4, 5))
    lines[broken - 1] = lines[broken - 1].replace(b",", b";", 4)
    lines[surplus - 1] += b",1,2"
    lines[latin1 - 1] = lines[latin1 - 1].replace(b"-2025", "-2025-Kühl".encode("latin-1"), 1)
    path.write_bytes(b"\n".join(lines))
    return {int(events[i]) + 2: str(march.loc[events[i], "snapshot_id"]) for i in range(6)}


def _rejects(path: Path) -> list[dict[str, str]]:
    with open(path, encoding="utf-8", newline="") as handle:
        return list(csv.DictReader(handle))


def test_malformed_rows_go_to_rejects_and_good_rows_are_grouped(
    demo_bundle: Bundle, march: pd.DataFrame, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    source = tmp_path / "march.csv"
    bad = _dirty_csv(march, source)
    out = tmp_path / "rc"
    assert causeline(["rootcause", "--bundle", str(demo_bundle.path), "--events", str(source),
                      "--out", str(out)]) == 0
    assert "rejected: 6 rows" in capsys.readouterr().out

    rejects = _rejects(out / REJECTS)
    assert [int(r["row"]) for r in rejects] == sorted(bad)
    reasons = {int(r["row"]): r["reason"] for r in rejects}
    lines = sorted(bad)
    assert "month: not a number: 'June'" in reasons[lines[0]]
    assert "went_warm_24h: label 'maybe'" in reasons[lines[1]]
    assert "case_type: unknown category 'igloo'" in reasons[lines[2]]
    assert reasons[lines[3]].startswith("broken line: ")
    assert reasons[lines[4]].startswith("broken line: ")
    assert reasons[lines[5]].startswith("not UTF-8 text (byte 0xfc")
    # OWASP "CSV Injection": the formula-looking id is escaped in the rejects file too.
    formula = next(r for r in rejects if int(r["row"]) == lines[2])
    assert formula["snapshot_id"].startswith("'=HYPERLINK(")

    summary = json.loads((out / SUMMARY).read_text("utf-8"))
    assert summary["counts"]["rejected"] == 6
    assert "<b>6</b>rows rejected (rejects.csv)" in (out / "report.html").read_text("utf-8")
    assert summary["counts"]["rows_read"] == len(march)
    # Every labelled event not rejected is grouped (or listed as ungrouped): none is lost.
    expected = set(march.loc[march["went_warm_24h"] == 1, "snapshot_id"]) - set(bad.values())
    grouped = pd.read_csv(out / EVENT_GROUPS, dtype={"event_id": str})
    assert set(grouped["event_id"]) == expected and len(grouped) == len(expected)


def test_malformed_lines_in_explain_input_go_beside_the_output(
    demo_bundle: Bundle, march: pd.DataFrame, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # explain's rule: unreadable rows are rejected; a row with a bad cell is still scored, the
    # cell treated as missing and a warning saying so (dropping it could hide an alert).
    source = tmp_path / "march.csv"
    bad = _dirty_csv(march.head(1000), source)
    out = tmp_path / "scores.csv"
    assert causeline(["explain", "--bundle", str(demo_bundle.path), "--input", str(source),
                      "--out", str(out)]) == 0
    assert "rejected: 3 unreadable rows" in capsys.readouterr().out
    rejects = _rejects(tmp_path / "scores.rejects.csv")
    assert [int(r["row"]) for r in rejects] == sorted(bad)[3:]
    scores = pd.read_csv(out, dtype={"id": str})
    assert len(scores) == 1000 - 3
    june = scores[scores["id"] == bad[sorted(bad)[0]]]
    assert "month: not a number" in june["warnings"].iloc[0]


def test_integers_too_large_to_read_are_rejected_rows_not_a_refused_file(
    demo_bundle: Bundle, march: pd.DataFrame, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # JSON puts no limit on an integer's size (RFC 8259 section 6); pandas' JSON reader refuses
    # a whole file over one past 64 bits, and its numeric conversion raises on one past float64.
    records = json.loads(march.head(20).to_json(orient="records"))
    lines = [json.dumps(record) for record in records]
    for row, digits in ((5, 400), (9, 22)):  # past float64, and past 64 bits only
        lines[row] = lines[row].replace(
            f'"suction_pressure_kpa": {json.dumps(records[row]["suction_pressure_kpa"])}',
            '"suction_pressure_kpa": ' + "9" * digits)
        assert "9" * digits in lines[row]
    source = tmp_path / "huge.jsonl"
    source.write_text("\n".join(lines) + "\n", "utf-8")
    out = tmp_path / "scores.csv"
    assert causeline(["explain", "--bundle", str(demo_bundle.path), "--input", str(source),
                      "--out", str(out)]) == 0
    assert "rejected: 2 unreadable rows" in capsys.readouterr().out
    rejects = _rejects(tmp_path / "scores.rejects.csv")
    assert [(int(r["row"]), r["reason"]) for r in rejects] == [
        (6, "suction_pressure_kpa: integer out of range (beyond 64 bits)"),
        (10, "suction_pressure_kpa: integer out of range (beyond 64 bits)")]
    scores = pd.read_csv(out, dtype={"id": str}, keep_default_na=False)
    assert len(scores) == 18


def test_integer_too_large_for_a_float_in_a_table_is_scored_as_missing() -> None:
    # pandas keeps such an integer as a Python int in an object column (a CSV cell of 400
    # digits, say); its numeric conversion raises on it instead of coercing it.
    from causeline.service.features.builder import FeatureBuilder
    from causeline.service.spec.dataset import FeatureSpec

    builder = FeatureBuilder([FeatureSpec(name="x", kind="numeric", role="observable")])
    table = pd.DataFrame({"x": pd.Series([1, 10**400, -(10**400)], dtype=object)})
    matrix = builder.transform(table)
    assert matrix.values[0, 0] == 1.0 and np.isnan(matrix.values[1:, 0]).all()
    assert [(p.row, p.message) for p in matrix.problems] == [
        (1, "value is infinite"), (2, "value is infinite")]


def test_jsonl_with_broken_lines_and_a_missing_column(
    demo_bundle: Bundle, march: pd.DataFrame, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    rows = march.head(50)
    lines = rows.to_json(orient="records", lines=True).splitlines()
    lines[3] = lines[3][:40]  # cut off
    lines[7] = "[1, 2]"
    source = tmp_path / "events.jsonl"
    source.write_text("\n".join(lines) + "\n", "utf-8")
    out = tmp_path / "scores.jsonl"
    base = ["explain", "--bundle", str(demo_bundle.path), "--out", str(out)]
    assert causeline([*base, "--input", str(source)]) == 0
    rejects = _rejects(tmp_path / "scores.rejects.csv")
    assert [(r["row"], r["reason"].split(":")[0]) for r in rejects] == [
        ("4", "broken line"), ("8", "broken line")]
    assert len(out.read_text("utf-8").splitlines()) == 48
    capsys.readouterr()

    # A missing column is no row's fault: the whole file stops with one line naming it.
    rows.drop(columns=["door_openings_per_h"]).to_csv(tmp_path / "cut.csv", index=False)
    for command in (
        [*base, "--input", str(tmp_path / "cut.csv")],
        ["rootcause", "--bundle", str(demo_bundle.path), "--events", str(tmp_path / "cut.csv"),
         "--out", str(tmp_path / "rc")],
    ):
        assert causeline(command) == 2
        lines = capsys.readouterr().err.strip().splitlines()
        error = [line for line in lines if not line.startswith("step ")]  # progress aside
        assert len(error) == 1 and "door_openings_per_h" in error[0], error
    assert not (tmp_path / "rc").exists()


# ---------------------------------------------------------------- code smuggled in data


class _Payload:
    """Unpickling this creates ``marker``: proof that a pickle was loaded."""

    def __init__(self, marker: Path) -> None:
        self.marker = marker

    def __reduce__(self) -> tuple[Any, tuple[str]]:
        return (Path.touch, (str(self.marker),))  # type: ignore[return-value]


def test_a_pickle_in_a_bundle_is_never_loaded(
    demo_bundle: Bundle, march: pd.DataFrame, tmp_path: Path
) -> None:
    marker = tmp_path / "pickle-was-loaded"
    bundle = tmp_path / "bundle"
    shutil.copytree(demo_bundle.path, bundle)
    payload = pickle.dumps(_Payload(marker))
    for name in ("model.pkl", "explainer.pickle", "calibration.joblib"):
        (bundle / name).write_bytes(payload)
    rechecksum(bundle, ("model.pkl", "explainer.pickle", "calibration.joblib"))

    loaded = load_bundle(bundle)  # checksums match, so it loads: as data only
    settings = Settings(bundle=bundle, prediction_log="off", access_log=False)
    with TestClient(create_app(settings)) as client:
        events = demo_events(march, bundle, rows=3)
        assert client.post("/v1/score", json={"events": events}).status_code == 200
    source = tmp_path / "march.parquet"
    march.to_parquet(source, index=False)
    assert causeline(["rootcause", "--bundle", str(bundle), "--events", str(source),
                      "--out", str(tmp_path / "rc")]) == 0
    assert causeline(["explain", "--bundle", str(bundle), "--input", str(source),
                      "--out", str(tmp_path / "x.csv")]) == 0
    assert loaded.version and not marker.exists()

    pickle.loads(payload)  # the payload is live: loading it anywhere would have left the marker
    assert marker.exists()


def test_yaml_config_with_a_python_tag_builds_nothing(tmp_path: Path) -> None:
    marker = tmp_path / "yaml-ran-code"
    config = tmp_path / "config.yaml"
    tag = f"!!python/object/apply:pathlib.Path.touch [{json.dumps(str(marker))}]"
    text = DEMO_CONFIG.read_text("utf-8")
    assert "name: display-cases" in text
    config.write_text(text.replace("name: display-cases", f"name: {tag}"), "utf-8")
    result = subprocess.run(
        [sys.executable, "-m", "causeline", "train", "--config", str(config), "--data",
         str(config), "--out", str(tmp_path / "b")], capture_output=True, text=True, timeout=120,
    )
    assert result.returncode == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "not valid YAML" in lines[0] and "python" in lines[0]
    assert not marker.exists() and not (tmp_path / "b").exists()
