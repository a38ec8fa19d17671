"""Online scoring from one entity's raw logs equals the batch build followed by /v1/score.

Issue 7's requirement that training and serving cannot drift apart: the snapshot the service
builds from raw logs must give the same features, score and contributions as the snapshot
``causeline build`` writes for the same entity and time.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from fastapi.testclient import TestClient

from fixtures.demo.generate import generate
from fixtures.demo.timeline import from_frame
from service.api import create_app
from service.explain import Explainer
from service.settings import Settings
from tests.conftest import FIXTURES
from training.build import RawPaths, build
from training.pipeline import train

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
        "failures": _records(logs.excursions[logs.excursions["case_id"] == case]
                             .astype({"start": str})),
        "actions": _records(logs.maintenance[logs.maintenance["case_id"] == case]
                            .astype({"time": str})),
        "attributes": _records(logs.cases[logs.cases["case_id"] == case])[0],
    }
    with TestClient(app) as client:
        response = client.post("/v1/score/timeline?contributions=all", json=body)
    assert response.status_code == 200, response.text
    online = response.json()["results"][0]

    from service.bundle import load_bundle

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
    for flag, name in (("--readings", "readings"), ("--events", "excursions"),
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
    joined = built_scores.join(raw, rsuffix="_raw")
    np.testing.assert_allclose(joined["probability"], joined["probability_raw"], atol=1e-12)
    assert (joined["reason_1"].fillna("") == joined["reason_1_raw"].fillna("")).all()
    assert main(["explain", "--bundle", str(bundle_path), *paths, "--latest",
                 "--out", str(tmp_path / "latest.csv")]) == 0
    latest = pd.read_csv(tmp_path / "latest.csv")
    assert len(latest) == logs.cases["case_id"].nunique()
