"""Outcomes joined from a failure log against the labels the demo generator planted.

The demo's raw logs (``fixtures/demo/timeline.py``) put each warm excursion inside the 24 h after
the snapshot whose ``went_warm_24h`` it makes true, so joining the excursion log to the daily
snapshots must give back exactly the generator's labels, but for the last snapshot of each case
(its horizon runs past the end of observation: censored, as training treats it).
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest
import yaml

from causeline.cli import main
from causeline.service.bundle.load import Bundle
from causeline.service.drift.job import DriftOptions, run_drift
from causeline.service.drift.outcomes import FailureOutcomes
from causeline.service.errors import DataError
from causeline.service.spec.dataset import DatasetSpec
from fixtures.demo.generate import generate
from fixtures.demo.timeline import from_frame

CONFIG = Path(__file__).resolve().parents[2] / "fixtures" / "demo" / "timeline.yaml"


def _spec() -> DatasetSpec:
    raw = yaml.safe_load(CONFIG.read_text())
    for key in ("training", "explain"):  # settings of training, not of the data set
        raw.pop(key)
    return DatasetSpec.model_validate(raw)


def test_joined_outcomes_are_the_planted_labels(tmp_path: Path) -> None:
    frame = generate(cases=12, days=60, seed=5)
    log = tmp_path / "excursions.parquet"
    from_frame(frame, seed=9).excursions.to_parquet(log, index=False)
    outcomes = FailureOutcomes.of(_spec(), log)
    for start in range(0, len(frame), 250):  # in chunks, as the window streams
        outcomes.add(frame.iloc[start:start + 250])
    y, told = outcomes.labels(log)
    truth = frame["went_warm_24h"].to_numpy(dtype=float)
    last = (frame.groupby("case_id")["snapshot_time"].transform("max")
            == frame["snapshot_time"]).to_numpy()
    known = ~np.isnan(y)
    assert truth.sum() > 10  # the check has positives to find
    np.testing.assert_array_equal(y[known], truth[known])
    # Censored: exactly the last snapshots that did not go warm.
    np.testing.assert_array_equal(~known, last & (truth == 0))
    assert told["censored"] == int((last & (truth == 0)).sum())
    assert told["events_labelled"] == int(known.sum())


def test_a_bundle_without_a_timeline_gets_one_line(demo_bundle: Bundle, tmp_path: Path,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    frame = generate(cases=5, days=20, seed=3)
    window, log = tmp_path / "w.parquet", tmp_path / "f.parquet"
    frame.to_parquet(window, index=False)
    from_frame(frame).excursions.to_parquet(log, index=False)
    with pytest.raises(DataError, match="not trained from timelines"):
        run_drift(demo_bundle, window, None, DriftOptions(failures=log))
    status = main(["drift", "--bundle", str(demo_bundle.path), "--input", str(window),
                   "--out", str(tmp_path / "o"), "--failures", str(log), "--label", "x"])
    err = capsys.readouterr().err
    assert status == 2 and len(err.strip().splitlines()) == 1 and "not both" in err


def test_the_job_checks_calibration_on_the_joined_outcomes(demo_bundle: Bundle,
                                                           tmp_path: Path) -> None:
    # The demo bundle, told the timeline its snapshots come from (same entity, time and label).
    dataset = demo_bundle.spec.model_copy(update={"timeline": _spec().timeline})
    bundle = dataclasses.replace(
        demo_bundle, manifest=demo_bundle.manifest.model_copy(update={"dataset": dataset}))
    frame = generate(cases=40, days=120, seed=21)
    window, log = tmp_path / "w.parquet", tmp_path / "f.parquet"
    frame.to_parquet(window, index=False)
    from_frame(frame, seed=2).excursions.to_parquet(log, index=False)
    joined = run_drift(bundle, window, None, DriftOptions(failures=log, replicates=20))
    last = frame.groupby("case_id")["snapshot_time"].transform("max") == frame["snapshot_time"]
    kept = frame[~(last & (frame["went_warm_24h"] == 0))]
    kept.to_parquet(tmp_path / "kept.parquet", index=False)
    given = run_drift(bundle, tmp_path / "kept.parquet", None,
                      DriftOptions(label="went_warm_24h", replicates=20))
    a, b = joined.summary["calibration"], given.summary["calibration"]
    assert a["rows"] == len(kept) and a["events"] == int(kept["went_warm_24h"].sum())
    for key in ("observed_rate", "mean_predicted"):
        assert a[key] == pytest.approx(b[key], rel=1e-9)
    assert a["roc_auc"]["estimate"] == pytest.approx(b["roc_auc"]["estimate"], rel=1e-9)
    assert joined.summary["outcomes"]["source"] == "failure log"
    assert joined.summary["outcomes"]["calibration"] == "checked"
