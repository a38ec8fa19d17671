"""Online scoring from one entity's raw logs equals the batch build followed by /v1/score.

Issue 7's requirement that training and serving cannot drift apart: the snapshot the service
builds from raw logs must give the same features, score and contributions as the snapshot
``causeline build`` writes for the same entity and time.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from fastapi.testclient import TestClient

from causeline.service.api.app import create_app
from causeline.service.api.bodies import TimelineScoreRequest
from causeline.service.api.problems import FieldError
from causeline.service.api.settings import Settings
from causeline.service.api.timeline import check_request
from causeline.service.bundle.load import load_bundle
from causeline.service.explain.explainer import Explainer
from causeline.training.build import RawPaths, build
from causeline.training.pipeline import train
from fixtures.demo.generate import generate
from fixtures.demo.timeline import from_frame
from tests.conftest import FIXTURES

TIMELINE_CONFIG = FIXTURES / "demo" / "timeline.yaml"


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory):  # type: ignore[no-untyped-def]
    folder = tmp_path_factory.mktemp("online")
    logs = from_frame(generate(cases=60, days=120), seed=11)
    paths = {}
    for name in ("readings", "excursions", "maintenance", "cases"):
        paths[name] = folder / f"{name}.parquet"
        getattr(logs, name).to_parquet(paths[name], index=False)
    raw = RawPaths(paths["readings"], paths["excursions"], paths["maintenance"], paths["cases"])
    snapshots = folder / "snapshots.parquet"
    build(TIMELINE_CONFIG, raw, snapshots)
    train(TIMELINE_CONFIG, snapshots, folder / "bundle")
    return logs, pd.read_parquet(snapshots), folder / "bundle"


def _records(frame: pd.DataFrame) -> list[dict]:
    return [
        {k: (None if isinstance(v, float) and np.isnan(v) else v) for k, v in row.items()}
        for row in frame.astype(object).to_dict("records")
    ]


def test_online_snapshot_scores_like_the_batch_build(built, tmp_path: Path) -> None:
    logs, snapshots, bundle_path = built
    app = create_app(Settings(bundle=str(bundle_path), prediction_log="off"))
    case = snapshots["case_id"].iloc[len(snapshots) // 2]
    at = pd.Timestamp(snapshots[snapshots["case_id"] == case]["snapshot_time"].iloc[40])
    readings = logs.readings[
        (logs.readings["case_id"] == case) & (pd.to_datetime(logs.readings["time"]) <= at)
    ].copy()
    readings["time"] = readings["time"].astype(str)
    body = {
        "readings": _records(readings),
        # The logs as they stood at `at`: a failure logged later would make the entity down now.
        "failures": _records(logs.excursions[(logs.excursions["case_id"] == case)
                                             & (logs.excursions["start"] <= at)]
                             .astype({"start": str})),
        "actions": _records(logs.maintenance[(logs.maintenance["case_id"] == case)
                                             & (logs.maintenance["time"] <= at)]
                            .astype({"time": str})),
        "attributes": _records(logs.cases[logs.cases["case_id"] == case])[0],
    }
    with TestClient(app) as client:
        response = client.post("/v1/score/timeline?contributions=all", json=body)
    assert response.status_code == 200, response.text
    online = response.json()["results"][0]

    from causeline.service.bundle.load import load_bundle

    bundle = load_bundle(bundle_path)
    row = snapshots[(snapshots["case_id"] == case)
                    & (pd.to_datetime(snapshots["snapshot_time"]) == at)]
    assert len(row) == 1
    batch = Explainer(bundle).explain(row)
    assert abs(online["probability"] - float(batch.probability[0])) < 1e-9
    names = bundle.spec.feature_names
    np.testing.assert_allclose(
        [online["contributions"][n] for n in names], batch.contributions.values[0], atol=1e-9
    )


def test_numbers_beyond_float_range_are_a_problem_not_a_crash(built) -> None:
    # JSON integers have no size limit; one past float64's range must get 422, not a 500.
    logs, snapshots, bundle_path = built
    case = snapshots["case_id"].iloc[0]
    readings = logs.readings[logs.readings["case_id"] == case].head(50).copy()
    readings["time"] = readings["time"].astype(str)
    records = _records(readings)
    number = next(k for k, v in records[-1].items() if isinstance(v, float))
    records[-1][number] = 10**400
    app = create_app(Settings(bundle=str(bundle_path), prediction_log="off"))
    with TestClient(app, raise_server_exceptions=False) as client:
        response = client.post("/v1/score/timeline", json={"readings": records})
    assert response.status_code == 422, response.text
    assert response.headers["content-type"].startswith("application/problem+json")


def test_model_without_timeline_refuses_raw_logs(demo_bundle) -> None:  # type: ignore[no-untyped-def]
    app = create_app(Settings(bundle=str(demo_bundle.path), prediction_log="off"))
    with TestClient(app) as client:
        response = client.post("/v1/score/timeline", json={"readings": [{"x": 1}]})
    assert response.status_code == 422
    assert response.headers["content-type"].startswith("application/problem+json")
    assert "built features" in response.json()["detail"]


def test_unbuildable_logs_are_a_problem_not_a_crash(built) -> None:
    _, _, bundle_path = built
    app = create_app(Settings(bundle=str(bundle_path), prediction_log="off"))
    with TestClient(app, raise_server_exceptions=False) as client:
        response = client.post("/v1/score/timeline", json={"readings": [{"case_id": "X"}]})
    assert response.status_code == 422, response.text
    assert response.json()["errors"][0]["field"] == "readings"


def test_explain_from_raw_logs_equals_explain_of_the_built_table(built, tmp_path: Path) -> None:
    from causeline.cli import main

    logs, snapshots, bundle_path = built
    paths = []
    for flag, name in (("--readings", "readings"), ("--failures", "excursions"),
                       ("--actions", "maintenance"), ("--attributes", "cases")):
        path = tmp_path / f"{name}.parquet"
        getattr(logs, name).to_parquet(path, index=False)
        paths += [flag, str(path)]
    table = tmp_path / "snapshots.parquet"
    snapshots.to_parquet(table, index=False)
    assert main(["explain", "--bundle", str(bundle_path), *paths,
                 "--out", str(tmp_path / "raw.parquet")]) == 0
    assert main(["explain", "--bundle", str(bundle_path), "--input", str(table),
                 "--out", str(tmp_path / "table.parquet")]) == 0
    raw = pd.read_parquet(tmp_path / "raw.parquet").set_index("id")
    built_scores = pd.read_parquet(tmp_path / "table.parquet").set_index("id")
    # Raw scoring also covers snapshots training leaves out (censored, down), so compare the
    # snapshots both have: every one of the built table's.
    assert set(built_scores.index) <= set(raw.index)
    joined = built_scores.join(raw.add_suffix("_raw"))
    np.testing.assert_allclose(joined["probability"], joined["probability_raw"], atol=1e-12)
    assert (joined["reason_1"].fillna("") == joined["reason_1_raw"].fillna("")).all()
    assert main(["explain", "--bundle", str(bundle_path), *paths, "--latest",
                 "--out", str(tmp_path / "latest.csv")]) == 0
    latest = pd.read_csv(tmp_path / "latest.csv")
    down = pd.read_csv(tmp_path / "latest.down.csv")
    # Every case once: scored now, or set apart as down (a warm excursion logged after its
    # last reading, which has not ended yet).
    assert len(latest) + len(down) == logs.cases["case_id"].nunique()
    assert set(down["down_rule"]) <= {"after failure", "until readings resume or a repair"}


# Bad input to the timeline endpoint: each must be a 422 problem naming the field that holds the
# bad value, as /v1/score names the field of an event (causeline.service.api.schema.EventSchema).


@pytest.fixture(scope="module")
def client(built):  # type: ignore[no-untyped-def]
    _, _, bundle_path = built
    app = create_app(Settings(bundle=str(bundle_path), prediction_log="off"))
    with TestClient(app, raise_server_exceptions=False) as client:
        yield client


@pytest.fixture()
def body(built) -> dict:  # type: ignore[no-untyped-def]
    """One case's first 50 readings (times as ISO text) and its attributes: a valid request."""
    logs, snapshots, _ = built
    case = snapshots["case_id"].iloc[0]
    readings = logs.readings[logs.readings["case_id"] == case].head(50).copy()
    readings["time"] = readings["time"].dt.strftime("%Y-%m-%dT%H:%M:%S")
    return {"readings": _records(readings),
            "attributes": _records(logs.cases[logs.cases["case_id"] == case])[0]}


def _refused(client: TestClient, body: dict | str) -> list[dict]:
    """The errors of a 422 problem-details answer; a str body is sent as written."""
    if isinstance(body, str):
        response = client.post("/v1/score/timeline", content=body,
                               headers={"content-type": "application/json"})
    else:
        response = client.post("/v1/score/timeline", json=body)
    assert response.status_code == 422, response.text
    assert response.headers["content-type"].startswith("application/problem+json")
    return response.json()["errors"]


def _json(body: dict, token: str) -> str:
    """The body as JSON text with the value "@" written as ``token``, which Python's json module
    would not write (NaN is no JSON, and it writes neither -0.0 as sent nor 400-digit floats)."""
    text = json.dumps(body)
    assert text.count('"@"') == 1
    return text.replace('"@"', token)


def test_the_valid_request_scores(client: TestClient, body: dict) -> None:
    # The requests below differ from this one in a single value.
    response = client.post("/v1/score/timeline", json=body)
    assert response.status_code == 200, response.text


@pytest.mark.parametrize("at", ["9999-12-31T23:59:59", "0001-01-01T00:00:00"])
def test_at_outside_pandas_time_range(client: TestClient, body: dict, at: str) -> None:
    # pandas' datetime64[ns] holds 1677-09-21 to 2262-04-11 (pandas user guide, "Timestamp
    # limitations"); these were scored as 1816-03-30 and 1754-08-30 after a silent wrap.
    errors = _refused(client, {**body, "at": at})
    assert [e["field"] for e in errors] == ["at"]
    assert at in errors[0]["message"] and "2262" in errors[0]["message"]


def test_reading_time_outside_pandas_time_range(client: TestClient, body: dict) -> None:
    # The same datetime64[ns] range: the last reading at 2300-01-01 used to wrap to 1715 and so
    # drop out of the look-back windows, the snapshot landing at the reading before it.
    body["readings"][-1]["time"] = "2300-01-01T00:00:00"
    errors = _refused(client, body)
    assert [e["field"] for e in errors] == ["readings.49.time"]
    assert "2262" in errors[0]["message"]


@pytest.mark.parametrize("number", ["1767225600", "-0.0"])
def test_a_number_is_not_a_calendar_time(client: TestClient, body: dict, number: str) -> None:
    # pandas reads a number as nanoseconds since 1970: -0.0 was read as 1970-01-01 and 1767225600
    # (Unix seconds) as 1970-01-01 00:00:01.77. The demo's clock is calendar time, so a JSON
    # number is no time, neither in a reading nor as `at`. Sent as written to keep -0.0.
    reading = body["readings"][-1]
    errors = _refused(client, _json({**body, "readings": [*body["readings"][:-1],
                                                          {**reading, "time": "@"}]}, number))
    assert errors == [{"field": "readings.49.time",
                       "message": "expected a time as ISO 8601 text, got a number"}]
    errors = _refused(client, _json({**body, "at": "@"}, number))
    assert [e["field"] for e in errors] == ["at"]


def test_at_before_every_reading(client: TestClient, body: dict) -> None:
    # Features at t read readings at or before t; before the first reading every look-back
    # feature would be missing, which used to be a 200 without a warning.
    first = body["readings"][0]["time"]
    earlier = (pd.Timestamp(first) - pd.Timedelta(minutes=1)).isoformat()
    errors = _refused(client, {**body, "at": earlier})
    assert errors == [{"field": "at", "message": f"no readings at or before {earlier}"}]
    assert client.post("/v1/score/timeline", json={**body, "at": first}).status_code == 200


def test_nan_in_a_reading(client: TestClient, body: dict) -> None:
    # NaN is no JSON number (RFC 8259, section 6); /v1/score refuses it, so must this endpoint.
    body["readings"][3]["suction_pressure_kpa"] = "@"
    errors = _refused(client, _json(body, "NaN"))
    assert errors == [{"field": "readings.3.suction_pressure_kpa",
                       "message": "NaN is not a JSON number; send null for an unknown value"}]


def test_boolean_in_a_reading(client: TestClient, body: dict) -> None:
    # JSON's true is no number (RFC 8259, section 3); it used to be read as 1.
    body["readings"][3]["suction_pressure_kpa"] = True
    errors = _refused(client, body)
    assert errors == [{"field": "readings.3.suction_pressure_kpa",
                       "message": "expected a number, got a boolean"}]


def test_unknown_field_in_a_reading(client: TestClient, body: dict, built) -> None:  # type: ignore[no-untyped-def]
    # As /v1/score treats event fields: passed over by default, refused when the server is
    # told to refuse them, and refused either way when it looks like a misspelling.
    body["readings"][3]["colour"] = "red"
    assert client.post("/v1/score/timeline", json=body).status_code == 200
    _, _, bundle_path = built
    spec = load_bundle(bundle_path).spec.timeline
    payload = TimelineScoreRequest.model_validate(body)
    assert check_request(spec, payload, reject_unknown=True) == [
        FieldError(field="readings.3.colour", message="unknown field")]
    strict = create_app(Settings(bundle=str(bundle_path), prediction_log="off",
                                 unknown_fields="reject"))
    with TestClient(strict) as other:
        assert other.post("/v1/score/timeline", json=body).status_code == 422
    measurement = spec.readings.measurements[0]
    body["readings"][3][measurement.upper()] = body["readings"][3].pop(measurement)
    errors = _refused(client, body)
    assert errors == [{"field": f"readings.3.{measurement.upper()}",
                       "message": f"unknown field; did you mean {measurement!r}?"}]


def test_attributes_of_another_entity(client: TestClient, body: dict) -> None:
    # Attributes join by entity; another case's would leave this one's missing, silently.
    body["attributes"]["case_id"] = "DC-9999"
    errors = _refused(client, body)
    assert [e["field"] for e in errors] == ["attributes.case_id"]


def test_infinite_at_is_a_plain_message(client: TestClient, body: dict) -> None:
    # 1e400 is past float64's range and parses as infinity; the message used to show NumPy's
    # np.float64(inf) under the field `readings`.
    errors = _refused(client, _json({**body, "at": "@"}, "1e400"))
    assert errors == [{"field": "at", "message": "expected a time as ISO 8601 text, got a number"}]


def test_huge_integer_at_is_one_error_under_at(client: TestClient, body: dict) -> None:
    # JSON integers have no size limit (RFC 8259, section 6); a 400-digit one used to give two
    # errors located at pydantic's union members, `at.str` and `at.float`.
    errors = _refused(client, _json({**body, "at": "@"}, "9" * 400))
    assert errors == [{"field": "at", "message": "expected a time as ISO 8601 text, got a number"}]


def test_two_entities_without_at(client: TestClient, body: dict) -> None:
    # No `at` was sent, so the message used to speak wrongly of explicit snapshot times.
    body["readings"][7]["case_id"] = "ANOTHER"
    errors = _refused(client, body)
    assert [e["field"] for e in errors] == ["readings.7.case_id"]
    assert "'ANOTHER'" in errors[0]["message"] and "explicit" not in errors[0]["message"]


def test_a_fractional_entity_id(client: TestClient, body: dict) -> None:
    # /v1/score takes an entity as a string or an integer; 7.5 is neither.
    for reading in body["readings"]:
        reading["case_id"] = 7.5
    errors = _refused(client, body)
    assert {e["field"] for e in errors} == {f"readings.{i}.case_id" for i in range(50)}
    assert {e["message"] for e in errors} == {"expected a string"}


def test_no_action_logged_is_a_state_not_a_missing_value(built) -> None:  # type: ignore[no-untyped-def]
    # A case never cleaned has no 'days since coil cleaning': that is what the case is, not a
    # gap in its data, so it raises no missing-value warning and reasons say it in words.
    _, snapshots, bundle_path = built
    explainer = Explainer(load_bundle(bundle_path))
    rows = snapshots.head(200).copy()
    rows["since_coil_cleaning_d"] = np.nan
    rows["discharge_pressure_kpa__last_4h"] = 2600.0  # well above any typical value
    rows.loc[rows.index[:3], "probe_battery_pct__last_4h"] = np.nan  # a real gap, for contrast
    explanation = explainer.explain(rows)
    warned = [w for row in explanation.warnings for w in row]
    assert not any("since_coil_cleaning_d" in w for w in warned)
    assert sum("probe_battery_pct__last_4h" in w for w in warned) == 3
    texts = [r.text for row in explanation.reasons for r in row if r.code == "CONDENSER_FOULED"]
    assert texts, "the fouled-condenser code should rank for these rows"
    assert all("no coil_cleaning logged" in text and "missing" not in text for text in texts)


def test_an_entity_down_now_is_refused_not_scored(client: TestClient, body: dict) -> None:
    # A warm excursion logged after the case's latest reading, with nothing logged since: by
    # the default down rule (down from the failure until readings resume) the case is down now
    # (now is the failure itself, its latest log entry), and a score
    # for it would be about nothing. The answer says so, with the rule (docs/timelines.md).
    last = pd.Timestamp(body["readings"][-1]["time"])
    failure = {"case_id": body["readings"][0]["case_id"], "type": "warm",
               "start": (last + pd.Timedelta("2h")).isoformat()}
    response = client.post("/v1/score/timeline", json={**body, "failures": [failure]})
    assert response.status_code == 409, response.text
    problem = response.json()
    assert problem["type"].endswith("entity-down")
    assert "is down at" in problem["detail"] and "after failure" in problem["detail"]
    # The same failure with `at` before it: the case was up then, and is scored.
    earlier = client.post("/v1/score/timeline", json={**body, "failures": [failure],
                                                      "at": last.isoformat()})
    assert earlier.status_code == 200, earlier.text
    # Readings resumed after the failure: up again, scored at the latest reading.
    resumed = dict(body["readings"][-1], time=(last + pd.Timedelta("6h")).isoformat())
    later = client.post("/v1/score/timeline",
                        json={**body, "failures": [failure],
                              "readings": [*body["readings"], resumed]})
    assert later.status_code == 200, later.text
    assert later.json()["results"][0]["id"].endswith((last + pd.Timedelta("6h")).isoformat())
