"""The demo's raw timelines rebuild the generator's daily snapshots (fixtures/demo/timeline.py).

The generator's own daily frame is the truth here: its labels, readings and cleaning days were
drawn before the raw logs were derived from them, so the builder must recover them exactly.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from causeline.cli import main as causeline
from causeline.service.features.logs import TimelineInputs
from causeline.training.build import build_table
from causeline.training.config import load_config
from fixtures.demo.generate import generate
from fixtures.demo.timeline import from_frame

CONFIG = Path(__file__).resolve().parents[2] / "fixtures" / "demo" / "timeline.yaml"


def test_raw_timeline_rebuilds_the_daily_snapshots(tmp_path: Path) -> None:
    frame = generate(cases=40, days=120, seed=5)
    timeline = from_frame(frame)
    inputs = TimelineInputs(timeline.readings, timeline.excursions, timeline.maintenance,
                            timeline.cases)
    result = build_table(load_config(CONFIG), inputs)
    table = result.table
    truth = frame.assign(snapshot_time=pd.to_datetime(frame["snapshot_time"]))
    merged = truth.merge(table, on=["case_id", "snapshot_time"], suffixes=("", "_built"))
    # Every day but the last is labelled (its 24 h run past the last reading: censored).
    assert len(merged) == len(table) == len(frame) - 40 + int(
        truth.loc[truth["snapshot_time"] == truth["snapshot_time"].max(), "went_warm_24h"].sum()
    )
    assert result.counts["censored"] + result.counts["positive"] + result.counts[
        "negative"] == len(frame)
    assert (merged["went_warm_24h_built"] == merged["went_warm_24h"]).all()
    assert (merged["suction_pressure_kpa__last_4h"] == merged["suction_pressure_kpa"]).all()
    assert (merged["controller_firmware_built"] == merged["controller_firmware"]).all()
    # Cleanings are logged at 05:00, one hour before the 06:00 snapshot.
    np.testing.assert_allclose(
        merged["since_coil_cleaning_d"], merged["days_since_coil_clean"] + 1 / 24, atol=1e-9
    )
    assert (merged["month_built"] == merged["month"]).all()


def test_build_command_writes_a_table_train_reads(tmp_path: Path, capsys) -> None:  # type: ignore[no-untyped-def]
    timeline = from_frame(generate(cases=24, days=90, seed=3))
    paths = {}
    for name in ("readings", "excursions", "maintenance", "cases"):
        paths[name] = tmp_path / f"{name}.parquet"
        getattr(timeline, name).to_parquet(paths[name], index=False)
    assert causeline(["build", "--config", str(CONFIG), "--list-features"]) == 0
    listed = capsys.readouterr().out.split()
    assert "discharge_pressure_kpa__count_above_7d" in listed and "since_coil_cleaning_d" in listed
    out = tmp_path / "snapshots.csv"
    status = causeline([
        "build", "--config", str(CONFIG), "--readings", str(paths["readings"]),
        "--failures", str(paths["excursions"]), "--actions", str(paths["maintenance"]),
        "--attributes", str(paths["cases"]), "--out", str(out),
    ])
    assert status == 0
    written = pd.read_csv(out)
    # Days 1..89 are all labelled; on day 90 only positives (the rest are censored).
    days = pd.to_datetime(written["snapshot_time"]).dt.normalize()
    assert (days < days.max()).sum() == 24 * 89
    assert written.loc[days == days.max(), "went_warm_24h"].eq(1).all()
    assert set(written["went_warm_24h"]) <= {0, 1}
    status = causeline(["build", "--config", str(CONFIG), "--readings", str(paths["readings"])])
    assert status == 2 and "--out" in capsys.readouterr().err


def test_now_reads_only_recent_rows_and_equals_the_cadence_build() -> None:
    # Scoring the fleet now keeps only the rows the windows read (and each state's last
    # value); the row it builds must still equal the full build's row at that moment, state
    # columns and time-since features included. Every case has a snapshot at 06:00 on day 80.
    from causeline.service.features.snapshots import build_snapshots, current_features

    frame = generate(cases=30, days=100, seed=8)
    timeline = from_frame(frame)
    inputs = TimelineInputs(timeline.readings, timeline.excursions, timeline.maintenance,
                            timeline.cases)
    config = load_config(CONFIG)
    assert config.timeline is not None
    built = build_snapshots(config.timeline, inputs)
    moment = pd.Timestamp(frame["snapshot_time"].min()).normalize() + pd.Timedelta("80D 6h")
    full = built[built["time"] == moment].set_index("case_id")
    now = current_features(config, inputs, as_of=moment.isoformat())
    scored = now.table.set_index("case_id")
    assert len(full) == 30 and set(scored.index) | set(now.down["case_id"]) == set(full.index)
    assert set(now.down["case_id"]) == set(full.index[full["snapshot_status"] == "down"])
    for name in config.timeline.feature_names:
        left, right = scored[name], full.loc[scored.index, name]
        if left.dtype.kind in "fi":
            np.testing.assert_allclose(left.to_numpy(float), right.to_numpy(float),
                                       rtol=1e-9, atol=1e-9, err_msg=name)
        else:
            assert (left.astype(str) == right.astype(str)).all(), name
