"""Tests for the invented refrigerated-case demo generator and its ground-truth helpers."""

from __future__ import annotations

import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from fixtures.demo import generate as gen

REPO = Path(__file__).resolve().parents[2]
SAMPLE = REPO / "fixtures" / "demo" / "sample.csv"

# Column names the demo config depends on, written out from the brief rather than read from
# the generator so a rename there fails here.
REQUIRED_COLUMNS = [
    "snapshot_id",
    "snapshot_time",
    "store_id",
    "case_id",
    "case_type",
    "controller_firmware",
    "suction_pressure_kpa",
    "compressor_duty_pct",
    "discharge_pressure_kpa",
    "days_since_coil_clean",
    "door_openings_per_h",
    "defrost_interval_h",
    "store_ambient_c",
    "month",
    "setpoint_c",
    "case_age_years",
    "case_length_m",
    "probe_battery_pct",
    "lighting_led",
    "went_warm_24h",
    "warm_minutes_next_24h",
    "planted_cause",
    "planted_causes_active",
]
PLANTED = ["refrigerant_leak", "dirty_coil", "door_traffic", "long_defrost", "firmware_fault"]
# Columns each fix may change: its target plus anything derived from it.
FIX_TOUCHES = {
    "dirty_coil": {"days_since_coil_clean", "discharge_pressure_kpa"},
    "long_defrost": {"defrost_interval_h"},
    "firmware_fault": {"controller_firmware"},
}
NOISE_COLUMNS = ["setpoint_c", "case_age_years", "case_length_m", "probe_battery_pct"]


@pytest.fixture(scope="module")
def frame() -> pd.DataFrame:
    """The default-size data set, built once for the module because several tests read it."""
    return gen.generate()


@pytest.fixture(scope="module")
def events(frame: pd.DataFrame) -> pd.DataFrame:
    return frame[frame["went_warm_24h"] == 1]


def test_same_seed_gives_identical_frame_and_other_seed_differs() -> None:
    first = gen.generate(cases=30, days=60, seed=11)
    second = gen.generate(cases=30, days=60, seed=11)
    pd.testing.assert_frame_equal(first, second)
    other = gen.generate(cases=30, days=60, seed=12)
    assert not np.array_equal(
        first["discharge_pressure_kpa"].to_numpy(), other["discharge_pressure_kpa"].to_numpy()
    )


def test_columns_and_hidden_prefix(frame: pd.DataFrame) -> None:
    missing = [c for c in REQUIRED_COLUMNS if c not in frame.columns]
    assert not missing
    extra = set(frame.columns) - set(REQUIRED_COLUMNS)
    # Anything beyond the documented columns must be marked hidden, so configs can skip it.
    assert extra
    assert all(c.startswith("_truth_") for c in extra)
    assert "_truth_leak_severity" in frame.columns


def test_ids_and_calendar(frame: pd.DataFrame) -> None:
    assert frame["snapshot_id"].is_unique
    assert frame["case_id"].str.fullmatch(r"DC-\d{4}").all()
    assert frame["store_id"].str.fullmatch(r"ST-\d{2,}").all()
    assert frame["snapshot_id"].str.fullmatch(r"DC-\d{4}-\d{4}-\d{2}-\d{2}").all()
    assert frame["case_id"].nunique() == 320
    assert frame["store_id"].nunique() >= 12
    times = pd.to_datetime(frame["snapshot_time"], format="%Y-%m-%dT%H:%M:%S")
    assert (times.dt.hour == 6).all()
    assert (times.dt.minute == 0).all()
    assert times.min() == pd.Timestamp("2025-01-01 06:00")
    assert times.dt.normalize().nunique() == 365
    assert (frame.groupby("case_id").size() == 365).all()
    assert (times.dt.month == frame["month"]).all()
    assert (frame.groupby("case_id")["store_id"].nunique() == 1).all()


def test_categorical_levels(frame: pd.DataFrame) -> None:
    assert set(frame["case_type"]) == {
        "multideck_dairy",
        "multideck_meat",
        "deli_service",
        "produce_open",
        "frozen_island",
    }
    assert {"4.2.1", "4.2.3"} <= set(frame["controller_firmware"])
    assert set(frame["lighting_led"]) == {0, 1}
    # Some cases change firmware during the year, but only a few.
    versions = frame.groupby("case_id")["controller_firmware"].nunique()
    assert 0 < (versions > 1).sum() < 0.25 * versions.size
    # Some stores neglect their coils for months while others clean them regularly.
    longest_gap = frame.groupby("store_id")["days_since_coil_clean"].max()
    assert (longest_gap >= 120).any()
    assert (longest_gap < 90).any()


def test_event_rate_in_range(frame: pd.DataFrame) -> None:
    assert 0.02 <= frame["went_warm_24h"].mean() <= 0.05


def test_planted_cause_set_exactly_on_events(frame: pd.DataFrame) -> None:
    is_event = frame["went_warm_24h"] == 1
    assert (frame.loc[~is_event, "planted_cause"] == "").all()
    assert set(frame.loc[is_event, "planted_cause"]) <= set(PLANTED) | {"baseline"}


def test_each_cause_yields_enough_events(events: pd.DataFrame) -> None:
    counts = events["planted_cause"].value_counts()
    for cause in PLANTED:
        assert counts.get(cause, 0) >= 150, cause
    assert counts.get("baseline", 0) > 0


def test_label_agrees_with_warm_minutes(frame: pd.DataFrame) -> None:
    minutes = frame["warm_minutes_next_24h"]
    assert ((minutes > gen.WARM_MINUTES).astype(int) == frame["went_warm_24h"]).all()
    assert minutes.between(0, 24 * 60).all()
    quiet = minutes[frame["went_warm_24h"] == 0]
    # Most non-event days never go warm, but short excursions under the limit time exist.
    assert (quiet == 0).mean() > 0.8
    assert (quiet > 0).sum() > 0


def test_limits_are_the_stated_ones() -> None:
    assert gen.WARM_LIMIT_C == 5.0
    assert gen.WARM_MINUTES == 120


def test_most_events_have_one_active_cause(frame: pd.DataFrame, events: pd.DataFrame) -> None:
    planted = events[events["planted_cause"] != "baseline"]
    single = planted[planted["planted_causes_active"] == 1]
    assert len(single) >= 0.7 * len(planted)
    # Where only one cause is active it should nearly always be the named one; a cause under
    # the activity threshold can still be drawn now and then, so allow a sliver of those.
    hazards = gen.cause_hazards(frame.loc[single.index])[PLANTED]
    assert (hazards.idxmax(axis=1) == single["planted_cause"]).mean() > 0.97


def test_causes_show_in_their_own_features(frame: pd.DataFrame, events: pd.DataFrame) -> None:
    by_cause = {cause: events[events["planted_cause"] == cause] for cause in PLANTED}
    assert (by_cause["firmware_fault"]["controller_firmware"] == "4.2.1").all()
    assert (by_cause["long_defrost"]["defrost_interval_h"] > 8).all()
    leak = by_cause["refrigerant_leak"]
    assert (leak["_truth_leak_severity"] > 0).all()
    warm_type = leak["case_type"] != "frozen_island"
    normal_type = frame["case_type"] != "frozen_island"
    assert leak.loc[warm_type, "suction_pressure_kpa"].median() < frame.loc[
        normal_type, "suction_pressure_kpa"
    ].quantile(0.1)
    assert leak["compressor_duty_pct"].median() > frame["compressor_duty_pct"].quantile(0.75)
    coil = by_cause["dirty_coil"]
    assert coil["days_since_coil_clean"].median() > 3 * frame["days_since_coil_clean"].median()
    assert coil["discharge_pressure_kpa"].median() > frame["discharge_pressure_kpa"].quantile(0.9)
    doors = by_cause["door_traffic"]["door_openings_per_h"]
    assert doors.median() > frame["door_openings_per_h"].quantile(0.9)


def test_noise_features_carry_no_signal(frame: pd.DataFrame) -> None:
    part = frame.iloc[:20000].copy()
    base = gen.cause_hazards(part)
    rng = np.random.default_rng(0)
    for column in [*NOISE_COLUMNS, "lighting_led"]:
        part[column] = rng.permutation(part[column].to_numpy())
    pd.testing.assert_frame_equal(gen.cause_hazards(part), base)


def test_expected_events_matches_realised_count(frame: pd.DataFrame) -> None:
    # Each row's event is an independent Bernoulli draw with p = 1 - exp(-sum of hazards), so
    # the realised count is Poisson-binomial with mean sum(p) and variance sum(p(1 - p)).
    # Four standard deviations leave a false alarm below 1e-4, yet catch draws that stray
    # from the hazards cause_hazards reports.
    p = gen.event_probability(frame)
    expected = gen.expected_events(frame)
    assert expected == pytest.approx(p.sum())
    sd = math.sqrt(float((p * (1 - p)).sum()))
    realised = int(frame["went_warm_24h"].sum())
    assert abs(realised - expected) < 4 * sd


def test_each_fix_avoids_about_its_own_events(frame: pd.DataFrame, events: pd.DataFrame) -> None:
    baseline = gen.expected_events(frame)
    counts = events["planted_cause"].value_counts()
    for fix in gen.FIXES:
        avoided = baseline - gen.expected_events(frame, fix=fix)
        assert avoided > 0, fix
        # Removing a cause should avoid roughly the events it produced; the band allows for
        # draw noise, the small residual hazard a fix leaves, and competing-risk overlap.
        assert 0.7 * counts[fix] < avoided < 1.3 * counts[fix], fix


def test_coil_fix_rederives_discharge_pressure(frame: pd.DataFrame) -> None:
    before = frame.copy()
    fixed = gen.apply_fix(frame, "dirty_coil")
    pd.testing.assert_frame_equal(frame, before)
    assert fixed["days_since_coil_clean"].max() <= 30
    changed = frame["days_since_coil_clean"] > 30
    assert changed.any()
    assert (
        fixed.loc[changed, "discharge_pressure_kpa"] < frame.loc[changed, "discharge_pressure_kpa"]
    ).all()
    pd.testing.assert_series_equal(
        fixed.loc[~changed, "discharge_pressure_kpa"], frame.loc[~changed, "discharge_pressure_kpa"]
    )
    untouched = [c for c in frame.columns if c not in FIX_TOUCHES["dirty_coil"]]
    pd.testing.assert_frame_equal(fixed[untouched], frame[untouched])


def test_defrost_and_firmware_fixes_move_only_their_targets(frame: pd.DataFrame) -> None:
    defrost = gen.apply_fix(frame, "long_defrost")
    assert defrost["defrost_interval_h"].max() == 6
    kept = frame["defrost_interval_h"] <= 6
    assert (defrost.loc[kept, "defrost_interval_h"] == frame.loc[kept, "defrost_interval_h"]).all()
    firmware = gen.apply_fix(frame, "firmware_fault")
    assert "4.2.1" not in set(firmware["controller_firmware"])
    was_fine = frame["controller_firmware"] != "4.2.1"
    assert (
        firmware.loc[was_fine, "controller_firmware"] == frame.loc[was_fine, "controller_firmware"]
    ).all()
    for fix, fixed in (("long_defrost", defrost), ("firmware_fault", firmware)):
        untouched = [c for c in frame.columns if c not in FIX_TOUCHES[fix]]
        pd.testing.assert_frame_equal(fixed[untouched], frame[untouched])


def test_fix_targets_are_columns(frame: pd.DataFrame) -> None:
    assert set(gen.FIXES) == {"dirty_coil", "long_defrost", "firmware_fault"}
    for fix, targets in gen.FIXES.items():
        assert fix in PLANTED
        for column, value in targets.items():
            assert column in frame.columns
            assert not column.startswith("_truth_")
            if isinstance(value, str):
                assert value in set(frame[column])
            else:
                assert pd.api.types.is_numeric_dtype(frame[column])


def test_unknown_fix_is_rejected(frame: pd.DataFrame) -> None:
    with pytest.raises(ValueError, match="unknown fix"):
        gen.expected_events(frame.iloc[:10], fix="refrigerant_leak")


def test_cli_writes_csv_and_parquet(tmp_path: Path) -> None:
    expected = gen.generate(cases=12, days=20, seed=3)
    parquet = tmp_path / "demo.parquet"
    assert gen.main(["--out", str(parquet), "--cases", "12", "--days", "20", "--seed", "3"]) == 0
    pd.testing.assert_frame_equal(pd.read_parquet(parquet), expected, check_dtype=False)

    # Run the script as a file, the way the README tells people to, to cover its entry point.
    csv = tmp_path / "out" / "demo.csv"
    script = REPO / "fixtures" / "demo" / "generate.py"
    args = ["--out", str(csv), "--cases", "12", "--days", "20", "--seed", "3"]
    subprocess.run([sys.executable, str(script), *args], check=True, capture_output=True)
    read = pd.read_csv(csv, keep_default_na=False)
    pd.testing.assert_frame_equal(read, expected, check_dtype=False)

    with pytest.raises(SystemExit):
        gen.main(["--out", str(tmp_path / "demo.txt"), "--cases", "2", "--days", "2"])
    assert not (tmp_path / "demo.txt").exists()


def test_committed_sample_is_current_and_small() -> None:
    assert SAMPLE.stat().st_size < 2_000_000
    read = pd.read_csv(SAMPLE, keep_default_na=False)
    pd.testing.assert_frame_equal(read, gen.generate(cases=24, days=365, seed=7), check_dtype=False)
