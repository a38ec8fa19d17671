"""Snapshots, look-back features and horizon labels from raw timelines (features.snapshots).

Known answers are worked out by hand in the comments; window aggregates are checked against a
direct computation written here with plain pandas on each window, not with the builder.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from causeline.service.errors import ConfigError, DataError
from causeline.service.features.logs import TimelineInputs
from causeline.service.features.snapshots import (
    STATUS,
    build_snapshots,
    current_features,
    entity_features,
    label_counts,
    labelled_table,
)
from causeline.service.spec.base import validate_model
from causeline.service.spec.dataset import DatasetSpec
from causeline.service.spec.timeline import TimelineSpec
from tests.features.leakage import check_no_leakage


def cycle_spec(**extra: object) -> TimelineSpec:
    data: dict[str, object] = {
        "clock": "cycle",
        "readings": {"entity": "unit", "time": "cycle", "measurements": ["x"]},
        "failures": {"entity": "unit", "time": "cycle"},
        "horizon": 3,
    }
    data.update(extra)
    return TimelineSpec.model_validate(data)


def status_of(built: pd.DataFrame, unit: str) -> dict[int, str]:
    rows = built[built["unit"] == unit]
    return dict(zip(rows["cycle"].astype(int), rows[STATUS], strict=True))


def readings_for(units: dict[str, int]) -> pd.DataFrame:
    """Units observed at cycles 1..last, x = cycle."""
    rows = [(unit, c, float(c)) for unit, last in units.items() for c in range(1, last + 1)]
    return pd.DataFrame(rows, columns=["unit", "cycle", "x"])


def test_labels_at_the_horizon_edges_and_censoring() -> None:
    # Horizon 3: a snapshot at t is positive when a failure falls in (t, t + 3].
    # Unit a fails at 10 (its last reading): t = 7 sees 10 = t + 3 (inside, closed end),
    # t = 6 does not (10 > 9) and is a negative because a is observed through 10 >= 9;
    # t = 10 is the failure itself: down, excluded.
    # Unit b never fails and is last seen at 5: t = 2 is negative (2 + 3 <= 5), t = 3..5 are
    # censored (their horizon runs past 5 with no failure seen).
    readings = readings_for({"a": 10, "b": 5})
    failures = pd.DataFrame({"unit": ["a"], "cycle": [10]})
    built = build_snapshots(cycle_spec(), TimelineInputs(readings, failures))
    a, b = status_of(built, "a"), status_of(built, "b")
    assert [a[t] for t in range(1, 11)] == ["negative"] * 6 + ["positive"] * 3 + ["down"]
    assert [b[t] for t in range(1, 6)] == ["negative", "negative"] + ["censored"] * 3

    dataset = DatasetSpec.model_validate({
        "name": "toy", "target": "y", "id": "id", "entity": "unit",
        "features": [{"name": "failures_before", "role": "observable"}],
        "timeline": cycle_spec().model_dump(),
    })
    table = labelled_table(dataset, built)
    # 9 + 2 labelled snapshots; none of the censored or down ones; ids name entity and time.
    assert len(table) == 11 and int(table["y"].sum()) == 3
    assert "a@7" in set(table["id"]) and "b@3" not in set(table["id"])
    as_negative = dataset.model_copy(update={"timeline": cycle_spec(censored="negative")})
    assert len(labelled_table(as_negative, built)) == 14


def test_each_failure_is_counted_by_its_last_snapshot() -> None:
    # Horizon 3 with a snapshot every cycle: unit a fails at 4 and at 9, so snapshots 1..3 all
    # foresee the failure at 4 and 6..8 the one at 9 (test_repeated_failures_and_time_since).
    # Each failure is counted once, by the last snapshot before it: 3 and 8.
    readings = readings_for({"a": 12})
    failures = pd.DataFrame({"unit": ["a", "a"], "cycle": [9, 4]})
    spec = cycle_spec(down={"after_failure": 1})
    built = build_snapshots(spec, TimelineInputs(readings, failures))
    dataset = DatasetSpec.model_validate({
        "name": "toy", "target": "y", "id": "id", "entity": "unit",
        "features": [{"name": "failures_before", "role": "context"}],
        "timeline": spec.model_dump(),
    })
    table = labelled_table(dataset, built).set_index("cycle")
    positive = table[table["y"] == 1]
    assert list(positive.index) == [1, 2, 3, 6, 7, 8]
    assert list(positive["failure_time"]) == [4, 4, 4, 9, 9, 9]
    assert list(positive["failure_counted"]) == [0, 0, 1, 0, 0, 1]
    assert (table.loc[table["y"] == 0, "failure_counted"] == 0).all()


def test_repeated_failures_and_time_since() -> None:
    # Failures at 4 and 9, readings 1..12, horizon 3, down for 1 cycle after a failure.
    readings = readings_for({"a": 12})
    failures = pd.DataFrame({"unit": ["a", "a"], "cycle": [9, 4]})
    spec = cycle_spec(down={"after_failure": 1})
    built = build_snapshots(spec, TimelineInputs(readings, failures)).set_index("cycle")
    assert list(built["failures_before"]) == [0, 0, 0, 1, 1, 1, 1, 1, 2, 2, 2, 2]
    since = built["since_failure_c"]
    assert since.iloc[:3].isna().all() and list(since.iloc[3:]) == [0, 1, 2, 3, 4, 0, 1, 2, 3]
    status = built[STATUS]
    # 1..3 see the failure at 4; 4 and 5 are down; 6..8 see 9; 9, 10 down; 11, 12 censored.
    assert list(status) == (["positive"] * 3 + ["down"] * 2 + ["positive"] * 3
                            + ["down"] * 2 + ["censored"] * 2)


def test_maintenance_just_before_a_failure_and_repair_ends_down_time() -> None:
    # Readings every hour 00:00..23:00; a coil cleaning at 09:59, a failure at 10:00 and the
    # repair at 14:30. With until_readings off, down lasts until the repair: snapshots
    # 10:00..14:00 are excluded, and 15:00 counts again. The cleaning one minute before the
    # failure is not a repair kind, so it neither ends the down time nor hides the failure from
    # the 09:00 snapshot.
    spec = TimelineSpec.model_validate({
        "readings": {"entity": "case", "time": "time", "measurements": ["x"]},
        "failures": {"entity": "case", "time": "time"},
        "actions": {"entity": "case", "time": "time", "kind_column": "kind",
                    "kinds": ["Coil cleaning", "repair"]},
        "horizon": "2h",
        "unit": "m",
        "down": {"until_action": ["repair"], "until_readings": False},
    })
    times = pd.date_range("2025-03-01", periods=24, freq="h")
    readings = pd.DataFrame({"case": "c1", "time": times, "x": np.arange(24.0)})
    failures = pd.DataFrame({"case": ["c1"], "time": [pd.Timestamp("2025-03-01 10:00")]})
    actions = pd.DataFrame({
        "case": ["c1", "c1"],
        "time": pd.to_datetime(["2025-03-01 09:59", "2025-03-01 14:30"]),
        "kind": ["Coil cleaning", "repair"],
    })
    built = build_snapshots(spec, TimelineInputs(readings, failures, actions)).set_index("time")
    status = built[STATUS]
    hour = status.index.hour
    assert set(status[(hour >= 8) & (hour <= 9)]) == {"positive"}
    assert set(status[(hour >= 10) & (hour <= 14)]) == {"down"}
    assert status[hour == 15].item() == "negative"
    cleaning = built["since_coil_cleaning_m"]
    assert cleaning[hour < 10].isna().all()
    assert cleaning[hour == 10].item() == pytest.approx(1.0)
    assert built["since_repair_m"][hour == 15].item() == pytest.approx(30.0)


def test_periodic_snapshots_at_a_fixed_hour() -> None:
    spec = TimelineSpec.model_validate({
        "readings": {"entity": "case", "time": "time", "measurements": ["x"]},
        "failures": {"entity": "case", "time": "time"},
        "horizon": "24h",
        "snapshots": {"every": "1d", "at": "06:00"},
        "windows": [{"span": "12h", "aggregations": ["mean", "count_above"], "limits": {"x": 5}}],
    })
    # Readings at 04:00, 05:00 ... over two days; x = hours since the first reading.
    times = pd.date_range("2025-03-01 04:00", periods=40, freq="h")
    readings = pd.DataFrame({"case": "c1", "time": times, "x": np.arange(40.0)})
    built = build_snapshots(spec, TimelineInputs(readings, None))
    assert list(built["time"]) == list(pd.to_datetime(["2025-03-01 06:00", "2025-03-02 06:00"]))
    # 2025-03-02 06:00 is x = 26; the 12 h window (18:00, 06:00] holds x = 15..26. At the first
    # snapshot the readings reach back 2 h of the 12 h window, under the default min_coverage
    # of half the window: its aggregates are missing, not a 2-hour mean passed off as 12 h.
    assert np.isnan(built["x__mean_12h"].iloc[0]) and np.isnan(built["x__count_above_12h"].iloc[0])
    assert built["x__mean_12h"].iloc[1] == pytest.approx(np.mean(np.arange(15, 27)))
    assert built["x__count_above_12h"].iloc[1] == 12.0
    assert built.attrs["thin_windows"] == {0: 1}


AGGREGATIONS = ["last", "mean", "min", "max", "std", "slope", "count", "count_above",
                "count_below", "vs_median"]


def direct(readings: pd.DataFrame, t: float, span: float | None, n: int | None,
           min_coverage: float, min_readings: int) -> pd.Series:
    """Each aggregation over one window, written directly: pandas and numpy on the rows.

    Coverage rules as docs/timelines.md states them: an aggregate other than last and count is
    missing where the entity's readings reach back less than min_coverage of the window (span:
    t minus the first reading over the span; readings: rows available over n), or where the
    window holds fewer than min_readings valid values.
    """
    past = readings[readings["cycle"] <= t]
    window = past.tail(n) if n is not None else past[past["cycle"] > t - (span or 0)]
    x = window["x"].dropna()
    times = window.loc[x.index, "cycle"]
    slope = np.nan
    if len(x) > 1 and times.nunique() > 1:
        slope = np.polyfit(times.to_numpy(float), x.to_numpy(float), 1)[0]
    out = pd.Series({
        "last": x.iloc[-1] if len(x) else np.nan,
        "mean": x.mean() if len(x) else np.nan,
        "min": x.min() if len(x) else np.nan,
        "max": x.max() if len(x) else np.nan,
        "std": x.std(ddof=1) if len(x) > 1 else np.nan,
        "slope": slope,
        "count": float(len(x)),
        "count_above": float((x > 0.5).sum()) if len(window) else np.nan,
        "count_below": float((x < -0.5).sum()) if len(window) else np.nan,
        "vs_median": x.iloc[-1] - x.median() if len(x) else np.nan,
    })
    if n is not None:
        coverage = len(window) / n
    else:
        coverage = min((t - readings["cycle"].min()) / span, 1.0) if span else 1.0
    if len(window) and (coverage < min_coverage or len(x) < min_readings):
        out[[a for a in AGGREGATIONS if a not in ("last", "count")]] = np.nan
    elif not len(window):
        out[[a for a in AGGREGATIONS if a != "count"]] = np.nan
    return out


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    steps=st.lists(
        st.tuples(st.sampled_from(["a", "b", "c"]), st.integers(0, 4),
                  st.one_of(st.none(), st.floats(-3, 3, allow_nan=False))),
        min_size=1, max_size=40,
    ),
    span=st.integers(1, 8),
    n=st.integers(1, 5),
    min_coverage=st.sampled_from([0.0, 0.5, 1.0]),
    min_readings=st.integers(1, 3),
)
def test_window_aggregates_match_a_direct_computation(
    steps: list[tuple[str, int, float | None]], span: int, n: int, min_coverage: float,
    min_readings: int,
) -> None:
    # Random timelines: repeated times, gaps and missing values included. The standard deviation
    # comes from running sums, good to about sqrt(machine epsilon) times the values' spread.
    clocks: dict[str, int] = {}
    rows = []
    for unit, gap, value in steps:
        clocks[unit] = clocks.get(unit, 0) + gap
        rows.append((unit, clocks[unit], np.nan if value is None else value))
    readings = pd.DataFrame(rows, columns=["unit", "cycle", "x"])
    rules = {"limits": {"x": {"above": 0.5, "below": -0.5}}, "min_coverage": min_coverage,
             "min_readings": min_readings}
    spec = cycle_spec(windows=[
        {"span": span, "aggregations": AGGREGATIONS, **rules},
        {"readings": n, "aggregations": AGGREGATIONS, **rules},
    ])
    built = build_snapshots(spec, TimelineInputs(readings, None))
    for _, snapshot in built.iterrows():
        own = readings[readings["unit"] == snapshot["unit"]]
        # Rows at the same time keep their log order, the builder's order too (stable sort).
        for tag, window_span, count in ((f"{span}c", span, None), (f"{n}r", None, n)):
            expected = direct(own, snapshot["cycle"], window_span, count, min_coverage,
                              min_readings)
            got = pd.Series({a: snapshot[f"x__{a}_{tag}"] for a in AGGREGATIONS})
            np.testing.assert_allclose(got.to_numpy(float), expected.to_numpy(float),
                                       rtol=1e-7, atol=1e-6, err_msg=f"{tag} at {snapshot}")


def test_a_bare_limit_serves_both_counts_and_a_missing_limit_is_an_error() -> None:
    readings = pd.DataFrame({"unit": "u", "cycle": range(1, 7), "x": [0, 1, 2, 3, 4, 5.0]})
    spec = cycle_spec(windows=[{"readings": 6, "aggregations": ["count_above", "count_below"],
                                "limits": {"x": 2}, "min_coverage": 0}])
    last = build_snapshots(spec, TimelineInputs(readings, None)).iloc[-1]
    # x = 0..5 against the limit 2: three above (3, 4, 5), two below (0, 1).
    assert (last["x__count_above_6r"], last["x__count_below_6r"]) == (3.0, 2.0)
    data = cycle_spec().model_dump()
    data["windows"] = [{"readings": 6, "aggregations": ["count_above"]}]
    with pytest.raises(ConfigError, match=r"count_above needs a limit for 'x'"):
        validate_model(TimelineSpec, data, "config.yaml")
    data["windows"] = [{"readings": 6, "aggregations": ["count_below"],
                        "limits": {"x": {"above": 3}}}]
    with pytest.raises(ConfigError, match=r"count_below needs a limit for 'x'"):
        validate_model(TimelineSpec, data, "config.yaml")


def leak_probe_inputs() -> tuple[TimelineSpec, pd.DataFrame]:
    rng = np.random.default_rng(3)
    units = np.repeat(["u1", "u2", "u3"], 60)
    cycles = np.tile(np.arange(1, 61), 3)
    readings = pd.DataFrame({"unit": units, "cycle": cycles, "x": rng.normal(size=180)})
    spec = cycle_spec(windows=[
        {"span": 10, "aggregations": AGGREGATIONS, "limits": {"x": 0.0}},
        {"readings": 4, "aggregations": ["mean", "std"]},
    ])
    return spec, readings


def test_features_at_t_do_not_change_when_rows_after_t_do() -> None:
    spec, readings = leak_probe_inputs()

    def builder(frame: pd.DataFrame) -> pd.DataFrame:
        return build_snapshots(spec, TimelineInputs(frame, None)).drop(columns=[STATUS])

    assert check_no_leakage(builder, readings, "unit", "cycle", ["x"]) == []


def test_a_window_that_reaches_past_t_is_caught() -> None:
    spec, readings = leak_probe_inputs()

    def leaking(frame: pd.DataFrame) -> pd.DataFrame:
        built = build_snapshots(spec, TimelineInputs(frame, None)).drop(columns=[STATUS])
        # A two-reading window centred on t, so it holds the reading after t (t + 1).
        ordered = frame.sort_values(["unit", "cycle"])
        centred = ordered.groupby("unit")["x"].transform(
            lambda s: s.rolling(3, center=True, min_periods=1).mean()
        )
        extra = ordered[["unit", "cycle"]].assign(x__centred=centred.to_numpy())
        return built.merge(extra, on=["unit", "cycle"])

    assert check_no_leakage(leaking, readings, "unit", "cycle", ["x"]) == ["x__centred"]


def test_one_entity_online_equals_the_batch_row() -> None:
    spec, readings = leak_probe_inputs()
    dataset = DatasetSpec.model_validate({
        "name": "toy", "target": "y", "id": "id", "entity": "unit",
        "features": [{"name": "x__mean_10c", "role": "observable"}],
        "timeline": spec.model_dump(),
    })
    batch = build_snapshots(spec, TimelineInputs(readings, None)).set_index(["unit", "cycle"])
    # Online, the service holds only the last 12 readings of u2 up to cycle 45.
    window = readings[(readings["unit"] == "u2") & readings["cycle"].between(34, 45)]
    row = entity_features(dataset, TimelineInputs(window, None))
    assert row["id"].tolist() == ["u2@45"]
    expected = batch.loc[("u2", 45)]
    for name in spec.feature_names:
        if name in ("failures_before", "since_failure_c"):
            continue
        np.testing.assert_allclose(row[name].item(), expected[name], rtol=1e-9, err_msg=name)


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"horizon": "soon"}, "horizon"),
        ({"windows": [{"span": 5, "aggregations": ["mean"], "measurements": ["y"]}]},
         "'y' is not a measurement"),
        ({"windows": [{"span": 5, "readings": 3, "aggregations": ["mean"]}]}, "exactly one"),
        ({"calendar": ["month"]}, "time clock"),
    ],
)
def test_timeline_config_errors_name_the_key(change: dict[str, object], message: str) -> None:
    data = cycle_spec().model_dump()
    data.update(change)
    with pytest.raises(ConfigError, match=message):
        validate_model(TimelineSpec, data, "config.yaml")


def hourly_spec() -> TimelineSpec:
    return TimelineSpec.model_validate({
        "readings": {"entity": "case", "time": "time", "measurements": ["x"]},
        "failures": {"entity": "case", "time": "time"},
        "horizon": "2h",
    })


def hourly_readings(times: list[object]) -> pd.DataFrame:
    return pd.DataFrame({"case": "c1", "time": pd.Series(times, dtype=object),
                         "x": np.arange(float(len(times)))})


@pytest.mark.parametrize("far", ["2300-01-01T00:00:00", "9999-12-31T23:59:59",
                                 "0001-01-01T00:00:00"])
def test_a_time_outside_pandas_nanosecond_range_stops_the_build(far: str) -> None:
    # The builder counts time in datetime64[ns], which holds only 1677-09-21 to 2262-04-11
    # (pandas user guide, "Timestamp limitations"); pandas parses a later or earlier time at a
    # coarser unit, and the cast to nanoseconds used to wrap round silently (9999-12-31 became
    # 1816-03-30, 2300-01-01 fell before the other readings). It must stop with one line,
    # naming the row counted from 1 as the other table checks do.
    readings = hourly_readings(["2025-03-01 00:00", "2025-03-01 01:00", far])
    with pytest.raises(DataError) as caught:
        build_snapshots(hourly_spec(), TimelineInputs(readings, None))
    message = str(caught.value)
    assert "\n" not in message and "row 3" in message and "'time'" in message
    assert far in message and "2262" in message
    # The same time as a datetime column read from Parquet (microseconds, which can hold it).
    stored = readings.assign(
        time=pd.to_datetime(readings["time"], format="ISO8601").astype("datetime64[us]"))
    with pytest.raises(DataError, match=r"row 3.*2262"):
        build_snapshots(hourly_spec(), TimelineInputs(stored, None))


@pytest.mark.parametrize("number", [1767225600, -0.0])
def test_a_number_is_no_calendar_time(number: float) -> None:
    # pandas reads a number as nanoseconds since 1970: 1767225600 (2026-01-01 in Unix
    # seconds) would be 1970-01-01 00:00:01.77 and -0.0 the epoch itself, both silently.
    readings = hourly_readings(["2025-03-01 00:00", number])
    with pytest.raises(DataError, match=r"row 2.*is a number, not a time"):
        build_snapshots(hourly_spec(), TimelineInputs(readings, None))
    numeric = pd.DataFrame({"case": "c1", "time": [1767225600, 1767229200], "x": [1.0, 2.0]})
    with pytest.raises(DataError, match=r"row 1.*is a number, not a time"):
        build_snapshots(hourly_spec(), TimelineInputs(numeric, None))


def test_a_snapshot_time_before_every_reading_is_refused() -> None:
    # A snapshot before the first reading has an empty look-back window: every feature would
    # be missing, a snapshot of nothing rather than of the time asked for.
    readings = hourly_readings(["2025-03-01 00:00", "2025-03-01 01:00"])
    with pytest.raises(DataError, match=r"at: no readings at or before 2025-02-28T23:59:00$"):
        build_snapshots(hourly_spec(), TimelineInputs(readings, None),
                        at=pd.Series(["2025-02-28 23:59"]))
    # At the first reading itself the window holds that reading (features read t <= at).
    built = build_snapshots(hourly_spec(), TimelineInputs(readings, None),
                            at=pd.Series(["2025-03-01 00:00"]))
    assert built["time"].tolist() == [pd.Timestamp("2025-03-01 00:00")]


def test_snapshot_times_for_two_entities_say_so_without_an_explicit_time() -> None:
    # The latest-reading snapshot (no time given) is built for one entity; the message must not
    # speak of explicit times the caller never gave.
    readings = pd.concat([hourly_readings(["2025-03-01 00:00"]),
                          hourly_readings(["2025-03-01 00:00"]).assign(case="c2")])
    with pytest.raises(DataError) as caught:
        build_snapshots(hourly_spec(), TimelineInputs(readings, None), at="latest")
    assert "2 entities ('c1', 'c2')" in str(caught.value)
    assert "explicit" not in str(caught.value)


def test_an_infinite_cycle_is_refused() -> None:
    # A JSON integer past float64's range reads as infinity; no cycle is infinite.
    readings = readings_for({"a": 5})
    with pytest.raises(DataError, match=r"at: inf is not a number \(cycle\)"):
        build_snapshots(cycle_spec(), TimelineInputs(readings, None),
                        at=pd.Series([float("inf")]))
    # A number is a fine snapshot time on a cycle clock.
    built = build_snapshots(cycle_spec(), TimelineInputs(readings, None), at=pd.Series([3]))
    assert built["cycle"].tolist() == [3]


def _hourly_down(down: dict, readings_hours: list[int], failures: list[tuple[int, str]],
                 actions: list[tuple[int, str]] = ()) -> pd.Series:  # type: ignore[assignment]
    """Status by hour for one pump: snapshots every hour 0..47, readings at the given hours."""
    start = pd.Timestamp("2025-05-01")
    spec = TimelineSpec.model_validate({
        "readings": {"entity": "pump", "time": "time", "measurements": ["flow"]},
        "failures": {"entity": "pump", "time": "time", "type_column": "type",
                     "types": ["trip", "seal"]},
        "actions": {"entity": "pump", "time": "time", "kind_column": "kind",
                    "kinds": ["repair", "reset"]},
        "snapshots": {"every": "1h"},
        "horizon": "2h",
        "down": down,
    })
    readings = pd.DataFrame({"pump": "p1", "time": [start + pd.Timedelta(hours=h)
                                                     for h in readings_hours],
                             "flow": 1.0})
    failures = pd.DataFrame({"pump": "p1", "time": [start + pd.Timedelta(hours=h)
                                                     for h, _ in failures],
                             "type": [k for _, k in failures]})
    actions_frame = pd.DataFrame({"pump": "p1", "time": [start + pd.Timedelta(hours=h)
                                                          for h, _ in actions],
                                  "kind": [k for _, k in actions]})
    built = build_snapshots(spec, TimelineInputs(readings, failures, actions_frame))
    hours = ((built["time"] - start) / pd.Timedelta(hours=1)).astype(int)
    return pd.Series(built[STATUS].to_numpy(), index=hours)


def _down_hours(status: pd.Series) -> list[int]:
    return [int(h) for h in status.index[status == "down"]]


# Worked by hand: readings every hour but 11..30 (the pump is off for repair), a trip at 10.
GAP = [h for h in range(48) if not 11 <= h <= 30]


def test_down_until_readings_resume_by_default() -> None:
    # Default rule: down from the failure at 10 until the first reading after it, at 31.
    status = _hourly_down({}, GAP, [(10, "trip")])
    assert _down_hours(status) == list(range(10, 31))
    assert status[8] == "positive" and status[9] == "positive" and status[31] == "negative"


def test_a_repair_before_readings_resume_ends_down_time_first() -> None:
    # Repair logged at 20:00: snapshots strictly after it count again, whichever comes first.
    status = _hourly_down({"until_action": ["repair"]}, GAP, [(10, "trip")], [(20, "repair")])
    assert _down_hours(status) == list(range(10, 21))


def test_max_caps_down_time_and_after_failure_is_a_minimum() -> None:
    capped = _hourly_down({"max": "6h"}, GAP, [(10, "trip")])
    assert _down_hours(capped) == list(range(10, 16))  # t - f < 6 h
    # Readings never stop here, so without a minimum only the failure hour would be down.
    status = _hourly_down({"after_failure": "3h"}, list(range(48)), [(10, "trip")])
    assert _down_hours(status) == [10, 11, 12, 13]  # t - f <= 3 h


def test_down_while_readings_are_missing_without_any_failure() -> None:
    # No failure: with stale_after 4h, the hours whose latest reading (10:00) is more than 4 h
    # old are down: 15..30.
    status = _hourly_down({"stale_after": "4h"}, GAP, [])
    assert _down_hours(status) == list(range(15, 31))
    assert "down" not in set(_hourly_down({}, GAP, []))


def test_a_rule_per_failure_type() -> None:
    # Trips reset in an hour (down 1 h at least, then until a reset); seals wait for a repair.
    down = {"until_readings": False, "until_action": ["repair"],
            "by_type": {"trip": {"after_failure": "1h", "until_readings": False,
                                 "until_action": ["reset"]}}}
    status = _hourly_down(down, list(range(48)), [(5, "trip"), (20, "seal")],
                          [(6, "reset"), (30, "repair")])
    assert _down_hours(status) == [5, 6, *range(20, 31)]


def test_build_counts_snapshots_per_down_rule() -> None:
    spec = TimelineSpec.model_validate({
        "readings": {"entity": "pump", "time": "time", "measurements": ["flow"]},
        "failures": {"entity": "pump", "time": "time"},
        "snapshots": {"every": "1h"}, "horizon": "2h",
        "down": {"after_failure": "2h", "stale_after": "4h"},
    })
    start = pd.Timestamp("2025-05-01")
    readings = pd.DataFrame({"pump": "p1", "time": [start + pd.Timedelta(hours=h) for h in GAP],
                             "flow": 1.0})
    failures = pd.DataFrame({"pump": ["p1"], "time": [start + pd.Timedelta(hours=40)]})
    counts = label_counts(build_snapshots(spec, TimelineInputs(readings, failures)))
    # 15..30 readings missing (16); 40..42 after the failure (3: 40 to 42 inclusive).
    assert counts["down: readings missing"] == 16
    assert counts["down: after failure"] == 3
    assert counts["down"] == 19


def test_down_rules_name_their_keys_when_wrong() -> None:
    base = {"readings": {"entity": "e", "time": "t", "measurements": ["x"]},
            "failures": {"entity": "e", "time": "t", "type_column": "k", "types": ["trip"]},
            "horizon": "1h"}
    with pytest.raises(ConfigError, match=r"down.by_type: 'seal' is not one of failures.types"):
        validate_model(TimelineSpec, {**base, "down": {"by_type": {"seal": {}}}}, "c")
    with pytest.raises(ConfigError, match=r"down.max: 'soon'"):
        validate_model(TimelineSpec, {**base, "down": {"max": "soon"}}, "c")


def test_now_is_each_entity_latest_known_moment() -> None:
    # Three pumps, readings every hour. p1 reads until 20:00 and never fails: scored at 20:00.
    # p2 reads until 14:00 and trips at 16:00, after its last reading: down, not scored.
    # p3 trips at 10:00 and reads again from 12:00 to 20:00: back up, scored at 20:00.
    start = pd.Timestamp("2025-05-01")
    hours = {"p1": range(0, 21), "p2": range(0, 15), "p3": [*range(0, 10), *range(12, 21)]}
    readings = pd.DataFrame([(pump, start + pd.Timedelta(hours=h), float(h))
                             for pump, hs in hours.items() for h in hs],
                            columns=["pump", "time", "flow"])
    failures = pd.DataFrame({"pump": ["p2", "p3"],
                             "time": [start + pd.Timedelta(hours=16),
                                      start + pd.Timedelta(hours=10)]})
    dataset = DatasetSpec.model_validate({
        "name": "pumps", "target": "y", "id": "id", "entity": "pump", "time": "time",
        "features": [{"name": "flow__mean_4h", "role": "observable"},
                     {"name": "failures_before", "role": "context"}],
        "timeline": {"readings": {"entity": "pump", "time": "time", "measurements": ["flow"]},
                     "failures": {"entity": "pump", "time": "time"},
                     "snapshots": {"every": "1h"}, "horizon": "2h",
                     "windows": [{"span": "4h", "aggregations": ["mean"]}]},
    })
    inputs = TimelineInputs(readings, failures)
    now = current_features(dataset, inputs)
    assert list(now.table["pump"]) == ["p1", "p3"]
    assert list(now.table["time"]) == [start + pd.Timedelta(hours=20)] * 2
    assert list(now.down["pump"]) == ["p2"]
    assert list(now.down["time"]) == [start + pd.Timedelta(hours=16)]
    # The same windows as training: the row equals the cadence build's row at 20:00.
    built = build_snapshots(dataset.timeline, inputs)  # type: ignore[arg-type]
    at_20 = built[built["time"] == start + pd.Timedelta(hours=20)].set_index("pump")
    assert now.table.set_index("pump")["flow__mean_4h"].to_dict() == (
        at_20["flow__mean_4h"].to_dict())
    # As of 12:30 every pump with a reading by then is scored; p2's trip is still ahead.
    then = current_features(dataset, inputs, as_of="2025-05-01T12:30:00")
    assert list(then.table["pump"]) == ["p1", "p2", "p3"] and len(then.down) == 0


def test_now_keeps_a_state_reported_once_long_ago() -> None:
    # Scoring now reads only the rows its 4 h window needs, but a state column (firmware,
    # reported once at the first reading) is copied as last seen: it must survive.
    start = pd.Timestamp("2025-05-01")
    readings = pd.DataFrame({"pump": "p1", "time": start + pd.to_timedelta(range(48), "h"),
                             "flow": np.arange(48.0),
                             "firmware": ["2.1", *([None] * 47)]})
    dataset = DatasetSpec.model_validate({
        "name": "pumps", "target": "y", "id": "id", "entity": "pump", "time": "time",
        "features": [{"name": "flow__mean_4h", "role": "observable"},
                     {"name": "firmware", "kind": "categorical", "role": "observable",
                      "categories": ["2.1"]}],
        "timeline": {"readings": {"entity": "pump", "time": "time", "measurements": ["flow"],
                                  "states": ["firmware"]},
                     "failures": {"entity": "pump", "time": "time", "optional": True},
                     "horizon": "2h", "windows": [{"span": "4h", "aggregations": ["mean"]}]},
    })
    now = current_features(dataset, TimelineInputs(readings, None))
    assert now.table["firmware"].tolist() == ["2.1"]
    assert now.table["flow__mean_4h"].tolist() == [pytest.approx(np.mean([44, 45, 46, 47]))]
