"""The root-cause job as every engine runs it: options checked before any work, then the groups
described, tracked across runs and written (``groups.csv``, ``event_groups.csv``, ``report.html``,
``rejects.csv``, ``summary.json``).

An engine reads, selects and explains the events and finds the groups its own way (the local
one in :mod:`causeline.service.rootcause.local`, the Dask one in
:mod:`causeline.service.dask.rootcause`), then hands :func:`finish_rootcause` what it found and
the :class:`Slices` that reach its events again. Everything lands in one folder written
atomically: a run that fails half-way leaves the previous run's folder exactly as it was.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, Protocol

import numpy as np
import pandas as pd

from causeline.service.actions.search import ActionFinder, common_action
from causeline.service.bundle.load import Bundle
from causeline.service.errors import DataError
from causeline.service.explain.reasons import ReasonCatalogue
from causeline.service.features.logs import RawPaths
from causeline.service.files.rejects import (
    write_rejects,
)
from causeline.service.files.spreadsheet import escape_frame
from causeline.service.files.storage import atomic_directory
from causeline.service.files.tables import write_table
from causeline.service.files.window import parse_time
from causeline.service.progress import Progress, Silent
from causeline.service.rootcause import report as htmlreport
from causeline.service.rootcause.fix import Target, fix_targets
from causeline.service.rootcause.grouping import (
    LEADING_SHARE,
    UNGROUPED,
    Group,
    find_groups,
    label_for,
)
from causeline.service.rootcause.tally import (
    Tally,
    group_row,
    weekly_frame,
)
from causeline.service.rootcause.tracking import (
    ABSOLUTE_TOLERANCE,
    MATCH_SIMILARITY,
    RELATIVE_TOLERANCE,
    SUMMARY,
    PreviousRun,
    read_previous,
    summary_groups,
    track,
)

GROUPS = "groups.csv"
EVENT_GROUPS = "event_groups.csv"
REPORT = "report.html"
REJECTS = "rejects.csv"


CAUTION = (
    "Model estimates, not a diagnosis. Groups, reason codes, events avoidable and the most "
    "common changes come from a statistical model of past data; they show associations and may "
    "be wrong. A proposed change is for qualified staff to review, never an instruction: stay "
    "within the equipment maker's limits, and keep settings that are not safe out of the "
    "config's change ranges. Where safety is at stake, follow the codes and rules that apply "
    "locally, the equipment maker's instructions and licensed practice, and have a qualified "
    "person inspect before acting."
)
STEPS = 6
# Group members the what-to-change search examines for the group's most common action: the
# share it brings below the threshold is then known to about +-5 points (binomial, 95 %).
ACTION_SAMPLE = 300


@dataclass(frozen=True)
class RootCauseOptions:
    predicted: bool = False
    since: str | None = None
    until: str | None = None
    previous: Path | None = None
    min_group_size: int | None = None
    fit_sample: int | None = None  # events the profiles are found on (default FIT_SAMPLE)


@dataclass(frozen=True)
class JobStart:
    """Options checked before any work: the window and the previous run's groups."""

    since: pd.Timestamp | None
    until: pd.Timestamp | None
    previous: PreviousRun | None


@dataclass(frozen=True)
class SelectedEvents:
    """What every engine hands to :func:`finish_rootcause` besides the groups: counts, the
    rejected rows and the feature rows co-driver shifts of the fix simulation are fitted on
    (:mod:`causeline.service.rootcause.fix`). ``repeats_dropped``: earlier prediction-log entries of
    event ids logged again (:func:`causeline.service.rootcause.intake.latest_entries`)."""

    reference: np.ndarray
    rejects: pd.DataFrame
    time_column: str | None
    rows_read: int
    rows_in_window: int
    repeats_dropped: int = 0
    foreseen: int = 0


@dataclass(frozen=True)
class Grouping:
    """The HDBSCAN groups (``groups`` labels), how they were found and their combined tally."""

    groups: int
    parameters: dict[str, Any]
    tally: Tally


class Slices(Protocol):
    """The steps that need every event again, done where the events are (one engine each)."""

    def avoidable(self, targets: list[list[Target]]) -> np.ndarray:
        """Per group label, the events its fix would have avoided and the risk reduction
        (two columns; model estimates)."""
        ...

    def event_frames(self, group_ids: list[str]) -> Iterator[pd.DataFrame]:
        """event_groups.csv rows, slice after slice in input order."""
        ...


@dataclass(frozen=True)
class RootCauseResult:
    """The run's group table and summary; ``event_groups`` is read back from its CSV."""

    groups: pd.DataFrame
    summary: dict[str, Any]
    folder: Path

    @property
    def event_groups(self) -> pd.DataFrame:
        text = {"event_id": "string", "group_id": "string", "entity": "string"}
        return pd.read_csv(self.folder / EVENT_GROUPS, dtype=text)


def start_rootcause(out: Path, options: RootCauseOptions) -> JobStart:
    """Check the options and the output folder before any work, so a bad flag fails at once."""
    _check_out(Path(out))
    if options.min_group_size is not None and options.min_group_size < 2:
        raise DataError("--min-group-size must be at least 2")
    if options.fit_sample is not None and options.fit_sample < 100:
        raise DataError("--fit-sample must be at least 100 events")
    return JobStart(
        since=parse_time(options.since, "--since"),
        until=parse_time(options.until, "--until"),
        previous=read_previous(options.previous) if options.previous else None,
    )


def finish_rootcause(
    bundle: Bundle,
    events_path: Path | RawPaths,
    out: Path,
    options: RootCauseOptions,
    start: JobStart,
    selection: SelectedEvents,
    grouping: Grouping,
    slices: Slices,
    progress: Progress | None = None,
) -> RootCauseResult:
    """Describe, track and write the groups: the part every engine shares."""
    progress = progress or Silent()
    tally, rejects = grouping.tally, selection.rejects
    since, until = start.since, start.until
    catalogue = ReasonCatalogue(bundle.spec, bundle.manifest.stats)
    codes = catalogue.code_ids
    threshold = bundle.manifest.decision.threshold
    found = find_groups(tally.mix, tally.count, codes)
    total = max(tally.events, 1)
    shares = [g.size / total for g in found]
    tracked = track([g.signature for g in found], shares, start.previous)

    progress(f"step 5/{STEPS}: describing {len(found)} groups and simulating their fixes")
    targets: list[list[Target]] = [[] for _ in range(grouping.groups)]
    for group in found:
        targets[group.label] = fix_targets(catalogue, group.leading)
    avoidable = slices.avoidable(targets)
    finder = ActionFinder(bundle) if any(f.change for f in bundle.spec.features) else None
    rows = []
    for position, group in enumerate(found):
        row = {
            "group_id": tracked.ids[position],
            "status": tracked.status[position],
            "share": shares[position],
            "previous_share": tracked.previous_share[position],
        }
        row.update(group_row(catalogue, group, tally, targets[group.label],
                             avoidable[group.label]))
        row.update(_common_action(finder, tally, group.label))
        rows.append(row)
    _tell_apart(rows, found)
    groups = _group_frame(rows, tally.events - tally.grouped, tally.events)
    group_ids = [""] * grouping.groups
    for position, group in enumerate(found):
        group_ids[group.label] = tracked.ids[position]

    caution = " ".join(part for part in (CAUTION, bundle.spec.caution) if part)
    summary = {
        "created": datetime.now(UTC).isoformat(timespec="seconds"),
        "bundle": {"name": bundle.name, "version": bundle.version},
        "input": str(events_path),
        "selection": "predicted" if options.predicted else "actual",
        "threshold": threshold,
        "window": {
            "time_column": selection.time_column,
            "since": since.isoformat() if since is not None else None,
            "until": until.isoformat() if until is not None else None,
            "first_event": _iso(tally.first_event),
            "last_event": _iso(tally.last_event),
        },
        "counts": {
            "rows_read": selection.rows_read,
            "rejected": len(rejects),
            "repeats_dropped": selection.repeats_dropped,
            "snapshots_before_counted_failures": selection.foreseen,
            "rows_in_window": selection.rows_in_window,
            "events": tally.events,
            "grouped": tally.grouped,
            "ungrouped": tally.events - tally.grouped,
            "groups": len(found),
            "events_with_warnings": tally.warned,
        },
        "parameters": {
            **grouping.parameters,
            "leading_share": LEADING_SHARE,
            "match_similarity": MATCH_SIMILARITY,
            "steady_tolerance": {"relative": RELATIVE_TOLERANCE, "absolute": ABSOLUTE_TOLERANCE},
        },
        "previous": str(options.previous) if options.previous else None,
        "last_group_number": tracked.last_number,
        "groups": summary_groups(
            tracked.ids, shares, [g.size for g in found],
            [r["label"] for r in rows], [g.signature for g in found],
        ),
        "gone": [
            {"group_id": g.group_id, "label": g.label, "previous_share": g.share,
             "previous_events": g.events}
            for g in tracked.gone
        ],
        "caution": caution,
    }

    progress(f"step 6/{STEPS}: writing {out}")
    report = htmlreport.ReportData(
        title=f"Root-cause groups: {bundle.name}",
        summary=summary,
        groups=groups,
        heatmap=_heatmap(found, tracked.ids, codes),
        weekly=weekly_frame(tally.weekly, group_ids, UNGROUPED),
        examples=_examples(found, tracked.ids, tally),
        caution=caution,
    )
    with atomic_directory(out) as staging:
        write_table(escape_frame(groups), staging / GROUPS)
        _write_frames(slices.event_frames(group_ids), staging / EVENT_GROUPS)
        htmlreport.write_report(report, staging / REPORT)
        write_rejects(rejects, staging / REJECTS)
        (staging / SUMMARY).write_text(
            json.dumps(summary, indent=2, ensure_ascii=False, allow_nan=False) + "\n", "utf-8"
        )
    return RootCauseResult(groups=groups, summary=summary, folder=out)


def _write_frames(frames: Iterator[pd.DataFrame], path: Path) -> None:
    """One CSV from consecutive frames (formula-like cells escaped), header once."""
    with open(path, "w", encoding="utf-8", newline="") as handle:
        first = True
        for frame in frames:
            escape_frame(frame).to_csv(handle, index=False, header=first)
            first = False


def _check_out(out: Path) -> None:
    """Refuse to replace a folder that is not an earlier run's output (it would be deleted)."""
    if not out.exists():
        return
    if not out.is_dir() or (any(out.iterdir()) and not (out / SUMMARY).is_file()):
        raise DataError(
            f"{out} exists and is not a root-cause output folder; refusing to replace it"
        )


def _tell_apart(rows: list[dict[str, Any]], found: list[Group]) -> None:
    """Two groups under one label say what tells them apart: the code whose share of the mix
    differs most between them, named on the group where it is larger."""
    for position, group in enumerate(found):
        twins = [other for j, other in enumerate(found)
                 if j != position and rows[j]["label"] == rows[position]["label"]]
        if not twins:
            continue
        codes = set(group.signature).union(*(o.signature for o in twins))
        gaps = {c: group.signature.get(c, 0.0) - max(o.signature.get(c, 0.0) for o in twins)
                for c in codes}
        code = max(sorted(gaps), key=lambda c: gaps[c])
        rows[position]["label"] += f" (more {label_for([code])})"


def _common_action(finder: ActionFinder | None, tally: Tally, label: int) -> dict[str, Any]:
    """The group's most common what-to-change action, over a sample of its events: the
    driver-value sample, ordered by a hash of each row's values, so both engines examine the
    same rows whenever the sample holds the whole group."""
    found = None
    if finder is not None:
        rows = tally.sample_rows[label]
        hashed = pd.util.hash_pandas_object(pd.DataFrame(rows), index=False).to_numpy()
        order = np.argsort(hashed, kind="stable")[:ACTION_SAMPLE]
        found = common_action(finder, rows[order])
    if found is None:
        return {"action_most_common": "", "action_chosen_share": None,
                "action_below_threshold_share": None, "action_events_examined": 0}
    return {"action_most_common": found.description,
            "action_chosen_share": round(found.chosen_share, 3),
            "action_below_threshold_share": round(found.below_share, 3),
            "action_events_examined": found.examined}


def _group_frame(rows: list[dict[str, Any]], ungrouped: int, events: int) -> pd.DataFrame:
    frame = pd.DataFrame(rows, columns=GROUP_COLUMNS)
    frame = frame.sort_values("events", ascending=False, kind="stable")
    tail = pd.DataFrame([{
        "group_id": UNGROUPED,
        "label": "ungrouped: no clear cause, or none shared with a group",
        "events": ungrouped,
        "share": ungrouped / max(events, 1),
        "drivers": "",
        "fix_action": "",
        "events_avoidable_model_estimate": None,
        "risk_reduction_model_estimate": None,
    }], columns=GROUP_COLUMNS)
    frame = tail if frame.empty else pd.concat([frame, tail], ignore_index=True)
    for column in ("share", "previous_share"):
        frame[column] = frame[column].astype(float).round(4)
    frame["action_events_examined"] = frame["action_events_examined"].astype("Int64")
    for column in [c for c in GROUP_COLUMNS if c.endswith("_contribution")]:
        frame[column] = frame[column].astype(float).round(3)
    # A count of events, estimated: tenths are as far as it can be read.
    for column in ("events_avoidable_model_estimate", "risk_reduction_model_estimate"):
        frame[column] = frame[column].astype(float).round(1)
    return frame.reset_index(drop=True)


GROUP_COLUMNS = [
    "group_id", "label", "status", "events", "share", "previous_share",
    "code_1", "code_1_mean_contribution", "code_2", "code_2_mean_contribution",
    "code_3", "code_3_mean_contribution",
    "driver_values", "drivers", "fix_code", "fix_kind", "fix_action", "fix_simulated",
    "events_avoidable_model_estimate", "risk_reduction_model_estimate",
    "action_most_common", "action_chosen_share", "action_below_threshold_share",
    "action_events_examined", "first_event", "last_event", "top_entities", "example_event_ids",
]


def _heatmap(found, ids, codes) -> pd.DataFrame:  # type: ignore[no-untyped-def]
    """Groups x codes: each group's mean share of each code, codes used by any group only."""
    frame = pd.DataFrame(
        [[g.signature.get(c, 0.0) for c in codes] for g in found], index=ids, columns=codes
    )
    if frame.empty:
        return frame
    return frame.sort_index().loc[:, frame.max(axis=0) >= 0.02]


def _examples(found, ids, tally) -> list[htmlreport.Example]:  # type: ignore[no-untyped-def]
    """Each group's strongest member, shown in full."""
    out = []
    for group, group_id in sorted(zip(found, ids, strict=True), key=lambda pair: pair[1]):
        best = tally.examples[group.label][0]
        out.append(htmlreport.Example(
            group_id=group_id, event_id=best.event_id, probability=best.probability,
            reasons=best.reasons,
        ))
    return out


def _iso(stamp: Any) -> str | None:
    return None if stamp is None or pd.isna(stamp) else pd.Timestamp(stamp).isoformat()
