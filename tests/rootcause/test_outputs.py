"""Root-cause outputs: spreadsheet-safe CSVs, atomic folders, ids tracked across runs, CLI."""

from __future__ import annotations

import csv
import json
from html import unescape
from pathlib import Path

import pandas as pd
import pytest

from causeline.cli import main
from causeline.service.errors import DataError
from causeline.service.explain.explainer import Explainer
from causeline.service.files.predlog import PredictionLogWriter
from causeline.service.rootcause import report as htmlreport
from causeline.service.rootcause.job import EVENT_GROUPS, GROUPS, RootCauseOptions
from causeline.service.rootcause.local import run_rootcause
from causeline.service.rootcause.tracking import PastGroup, PreviousRun, track
from fixtures.demo.generate import FAULTY_FIRMWARE

MARCH = RootCauseOptions(since="2025-03-01", until="2025-04-01")


@pytest.fixture(scope="module")
def bundle(demo_bundle):  # type: ignore[no-untyped-def]
    return demo_bundle


@pytest.fixture(scope="module")
def fleet(demo_table) -> pd.DataFrame:  # type: ignore[no-untyped-def]
    return demo_table


def _cells(path: Path, column: str) -> list[str]:
    with open(path, encoding="utf-8", newline="") as handle:
        return [row[column] for row in csv.DictReader(handle)]


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


def test_formula_cells_are_escaped_in_both_csvs(bundle, fleet, tmp_path) -> None:  # type: ignore[no-untyped-def]
    # OWASP "CSV Injection": cells starting with = + - @ tab or CR get a leading single quote.
    table = fleet.copy()
    table["snapshot_id"] = '=HYPERLINK("http://example.invalid")-' + table["snapshot_id"]
    table["case_id"] = "@Kühlregal-" + table["case_id"].str[-1]
    data = tmp_path / "events.csv"
    table.to_csv(data, index=False)
    run_rootcause(bundle, data, tmp_path / "out", MARCH)
    times = pd.to_datetime(table["snapshot_time"])
    selected = (times >= "2025-03-01") & (times < "2025-04-01") & (table["went_warm_24h"] == 1)

    ids = _cells(tmp_path / "out" / EVENT_GROUPS, "event_id")
    entities = _cells(tmp_path / "out" / EVENT_GROUPS, "entity")
    assert len(ids) == int(selected.sum())  # nothing dropped
    assert all(cell.startswith("'=HYPERLINK(") for cell in ids)
    assert all(cell.startswith("'@Kühlregal-") for cell in entities)
    examples = _cells(tmp_path / "out" / GROUPS, "example_event_ids")
    top = _cells(tmp_path / "out" / GROUPS, "top_entities")
    grouped = [cell for cell in examples if cell]
    assert grouped and all(cell.startswith("'=HYPERLINK(") for cell in grouped)
    assert all(cell.startswith("'@Kühlregal-") for cell in top if cell)
    html = (tmp_path / "out" / "report.html").read_text("utf-8")
    assert '=HYPERLINK("http://example.invalid")' in unescape(html)  # shown, as text
    assert '=HYPERLINK("http' not in html
    # Self-contained: nothing to fetch, nothing to run.
    assert "<script" not in html and 'src="' not in html and "<link" not in html


def test_failed_run_leaves_previous_folder_byte_identical(  # type: ignore[no-untyped-def]
    demo_parquet, bundle, monkeypatch, tmp_path
) -> None:
    out = tmp_path / "out"
    run_rootcause(bundle, demo_parquet, out, MARCH)
    before = _snapshot(out)

    def broken(*args, **kwargs):  # type: ignore[no-untyped-def]
        raise RuntimeError("disk full")

    monkeypatch.setattr(htmlreport, "write_report", broken)
    april = RootCauseOptions(since="2025-04-01", until="2025-05-01")
    with pytest.raises(RuntimeError):
        run_rootcause(bundle, demo_parquet, out, april)
    assert _snapshot(out) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out"]


def test_refuses_to_replace_a_folder_that_is_not_an_output(demo_parquet, bundle, tmp_path) -> None:  # type: ignore[no-untyped-def]
    precious = tmp_path / "notes"
    precious.mkdir()
    (precious / "keep.txt").write_text("mine")
    with pytest.raises(DataError, match="not a root-cause output folder"):
        run_rootcause(bundle, demo_parquet, precious, MARCH)
    assert (precious / "keep.txt").read_text() == "mine"


def _leading(folder: Path) -> dict[str, str]:
    """Leading code -> id of the largest group it leads (a small mixed group may share it)."""
    groups = pd.read_csv(folder / GROUPS)
    groups = groups[groups["code_1"].notna()].sort_values("events", ascending=False)
    return dict(groups.groupby("code_1", sort=False)["group_id"].first())


def test_ids_are_kept_across_runs_and_gone_groups_listed(  # type: ignore[no-untyped-def]
    demo_parquet, bundle, fleet, tmp_path
) -> None:
    data = demo_parquet
    first, second, third = tmp_path / "a", tmp_path / "b", tmp_path / "c"
    run_rootcause(bundle, data, first)
    run_rootcause(bundle, data, second, RootCauseOptions(previous=first))
    a = pd.read_csv(first / EVENT_GROUPS)
    b = pd.read_csv(second / EVENT_GROUPS)
    assert (a["group_id"] == b["group_id"]).all()
    statuses = pd.read_csv(second / GROUPS).dropna(subset=["status"])["status"]
    assert len(statuses) >= 5 and set(statuses) == {"steady"}

    # With one planted cause taken out of the fleet (every row on the demo generator's faulty
    # firmware, FAULTY_FIRMWARE), its group is gone and the other causes keep their ids.
    # Dropping only the events it caused would not do: other events on that firmware still
    # (rightly) carry the firmware reason and keep a smaller group alive.
    without = tmp_path / "without-firmware.parquet"
    fleet[fleet["controller_firmware"] != FAULTY_FIRMWARE].to_parquet(without, index=False)
    run_rootcause(bundle, without, third, RootCauseOptions(previous=second))
    before, after = _leading(second), _leading(third)
    gone = json.loads((third / "summary.json").read_text("utf-8"))["gone"]
    assert before["FIRMWARE_FAULT"] in {g["group_id"] for g in gone}
    assert "FIRMWARE_FAULT" not in after
    for code in ("REFRIGERANT_LOW", "CONDENSER_FOULED", "DOOR_TRAFFIC_HIGH",
                 "DEFROST_INTERVAL_LONG"):
        assert after[code] == before[code], code


def test_new_groups_never_reuse_an_old_number() -> None:
    # Worked by hand: B matches G-002, A is gone, C is new and numbered past the last id (G-003).
    previous = PreviousRun(
        groups=[
            PastGroup("G-001", 0.5, 50, "a", {"A": 1.0}),
            PastGroup("G-002", 0.2, 20, "b", {"B": 0.9, "A": 0.1}),
        ],
        last_number=3,
    )
    tracked = track([{"B": 1.0}, {"C": 1.0}], [0.5, 0.1], previous)
    assert tracked.ids == ["G-002", "G-004"]
    assert tracked.status == ["growing", "new"]
    assert [g.group_id for g in tracked.gone] == ["G-001"]


def _log(bundle, fleet: pd.DataFrame, folder: Path) -> pd.DataFrame:  # type: ignore[no-untyped-def]
    rows = fleet[fleet["snapshot_time"].str.startswith("2025-03")].head(1500)
    writer = PredictionLogWriter(folder)
    records = [
        {"logged_at": f"{row['snapshot_time']}+00:00", "model": bundle.name,
         "version": bundle.version, "id": row["snapshot_id"], "probability": 0.0,
         "decision": False, "reasons": [], "event": dict(row)}
        for row in rows.drop(columns=["went_warm_24h"]).to_dict("records")
    ]
    writer.append(records)
    writer.close()
    return rows


def test_prediction_log_needs_predicted(bundle, fleet, tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    rows = _log(bundle, fleet, tmp_path / "log")
    args = ["rootcause", "--bundle", str(bundle.path), "--events", str(tmp_path / "log"),
            "--out", str(tmp_path / "out")]
    assert main(args) == 2
    error = capsys.readouterr().err.strip().splitlines()
    assert len(error) == 1 and "--predicted" in error[0]
    assert not (tmp_path / "out").exists()

    assert main([*args, "--predicted"]) == 0
    events = pd.read_csv(tmp_path / "out" / EVENT_GROUPS)
    assert len(events) == int(Explainer(bundle).explain(rows).decision.sum())
    assert "step 1/" in capsys.readouterr().err


def test_cli_errors_are_one_line(demo_parquet, bundle, tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    data = demo_parquet
    base = ["rootcause", "--bundle", str(bundle.path), "--events", str(data),
            "--out", str(tmp_path / "out")]
    for extra, word in ((["--since", "last tuesday"], "--since"),
                        (["--min-group-size", "1"], "--min-group-size")):
        assert main([*base, *extra]) == 2
        lines = capsys.readouterr().err.strip().splitlines()
        assert len(lines) == 1 and word in lines[0], lines


def test_broken_prediction_log_lines_are_rejected_not_fatal(bundle, fleet, tmp_path) -> None:  # type: ignore[no-untyped-def]
    rows = _log(bundle, fleet, tmp_path / "log")
    segment = sorted((tmp_path / "log").glob("segment-*.jsonl"))[0]
    with open(segment, "a", encoding="utf-8") as handle:
        handle.write("{not json\n")
        handle.write('{"id": "x", "probability": 0.5}\n')
    out = tmp_path / "out"
    run_rootcause(bundle, tmp_path / "log", out, RootCauseOptions(predicted=True))
    rejects = pd.read_csv(out / "rejects.csv")
    assert sorted(rejects["reason"]) == ["no event object", "not JSON"]
    assert all(cell.startswith(segment.name + ":") for cell in rejects["row"])
    summary = json.loads((out / "summary.json").read_text())
    assert summary["counts"]["rejected"] == 2
    events = pd.read_csv(out / EVENT_GROUPS)
    assert len(events) == int(Explainer(bundle).explain(rows).decision.sum())


def _entry(bundle, event: dict, logged_at: pd.Timestamp) -> dict:  # type: ignore[no-untyped-def]
    return {"logged_at": logged_at.isoformat(timespec="milliseconds"), "model": bundle.name,
            "version": bundle.version, "id": event.get("snapshot_id", "0"), "probability": 0.0,
            "decision": False, "reasons": [], "event": event}


def test_repeated_event_ids_in_a_prediction_log_count_once(bundle, fleet, tmp_path) -> None:  # type: ignore[no-untyped-def]
    # Client retries: the same 1,500 event ids logged three times must give the run of the log
    # that holds each once. The copies that must lose carry other rows' fields (April's), so
    # picking the wrong copy changes the events, not just their number.
    rows = fleet[fleet["snapshot_time"].str.startswith("2025-03")].head(1500)
    stale = fleet[fleet["snapshot_time"].str.startswith("2025-04")].head(1500)
    events = rows.drop(columns=["went_warm_24h"]).to_dict("records")
    others = stale.drop(columns=["went_warm_24h"]).to_dict("records")
    decided = Explainer(bundle).explain(rows).decision
    # Flagged events sent without an id, each logged twice: they are not one event.
    anonymous = [{k: v for k, v in e.items() if k != "snapshot_id"}
                 for e, flagged in zip(events, decided, strict=True) if flagged][:3]
    start = pd.Timestamp("2026-12-01T08:00:00+00:00")
    late = start + pd.Timedelta(minutes=5)
    keep = [_entry(bundle, e, late) for e in events]
    blank = [_entry(bundle, e, start) for e in anonymous + anonymous]

    once = PredictionLogWriter(tmp_path / "once")
    once.append(keep + blank)
    once.close()
    # Written first, same time as the kept copy: a tie goes to the later position in the log.
    tied = [_entry(bundle, {**o, "snapshot_id": e["snapshot_id"]}, late)
            for e, o in zip(events, others, strict=True)]
    # Written last but logged earlier (another replica's clock): the earlier time loses.
    earlier = [_entry(bundle, {**o, "snapshot_id": e["snapshot_id"]}, start)
               for e, o in zip(events, others, strict=True)]
    thrice = PredictionLogWriter(tmp_path / "thrice", segment_bytes=400_000)
    for batch in (tied, keep, blank, earlier):
        thrice.append(batch)
    thrice.close()
    assert len(list((tmp_path / "thrice").glob("segment-*.jsonl"))) > 1

    options = RootCauseOptions(predicted=True)
    a = run_rootcause(bundle, tmp_path / "once", tmp_path / "a", options)
    b = run_rootcause(bundle, tmp_path / "thrice", tmp_path / "b", options)
    counts_a, counts_b = a.summary["counts"], b.summary["counts"]
    assert counts_a["repeats_dropped"] == 0
    assert counts_b["repeats_dropped"] == 2 * len(events)
    assert counts_b["rows_read"] == 3 * len(events) + len(blank)
    skip = {"rows_read", "repeats_dropped"}
    assert {k: v for k, v in counts_b.items() if k not in skip} == {
        k: v for k, v in counts_a.items() if k not in skip
    }
    assert counts_a["events"] == int(decided.sum()) + len(blank)  # id-less copies all stay
    assert counts_a["groups"] > 0
    pd.testing.assert_frame_equal(b.groups, a.groups)
    pd.testing.assert_frame_equal(b.event_groups, a.event_groups)
    assert int(b.event_groups["event_id"].isna().sum()) == len(blank)
    # The report says so too, for a reader who sees only it.
    report = (tmp_path / "b" / "report.html").read_text("utf-8")
    assert f"<b>{2 * len(events):,}</b>repeated log entries dropped" in report
    assert "repeated log entries dropped" not in (tmp_path / "a" / "report.html").read_text()


def test_each_group_names_its_most_common_change(demo_parquet, bundle, tmp_path) -> None:  # type: ignore[no-untyped-def]
    # Outside truth: the demo generator's planted causes. A group led by a controllable cause
    # (coil, firmware, defrost) gets that cause's own feature as its most common change, and
    # the change brings most of its flagged events below the threshold; a group led by an
    # observable cause (a leak, door traffic) has no change that does.
    from tests.conftest import DEMO_CAUSE_CODES

    run_rootcause(bundle, demo_parquet, tmp_path / "out", RootCauseOptions())
    groups = pd.read_csv(tmp_path / "out" / GROUPS).set_index("code_1")
    feature = {"dirty_coil": "days_since_coil_clean", "firmware_fault": "controller_firmware",
               "long_defrost": "defrost_interval_h"}
    for cause, code in DEMO_CAUSE_CODES.items():
        row = groups.loc[code]
        row = row.iloc[0] if isinstance(row, pd.DataFrame) else row
        assert row["action_events_examined"] >= 20, (code, row["action_events_examined"])
        if cause in feature:
            assert str(row["action_most_common"]).startswith(feature[cause] + " -> "), code
            assert row["action_below_threshold_share"] >= 0.8, (code, row.to_dict())
        else:
            assert row["action_below_threshold_share"] < 0.2, (code, row.to_dict())
    html = (tmp_path / "out" / "report.html").read_text("utf-8")
    assert "Most common change: days_since_coil_clean -&gt; 0" in html
