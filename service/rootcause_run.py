"""The root-cause batch job end to end: events in, groups.csv / event_groups.csv / report out.

Everything lands in one folder written atomically: a run that fails half-way leaves the previous
run's folder exactly as it was.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from service import htmlreport
from service.bundle import Bundle
from service.csvsafe import escape_frame
from service.errors import DataError
from service.explain import Explainer, Explanation
from service.predlog import is_prediction_log
from service.reasons import ReasonCatalogue
from service.rejects import (
    write_rejects,
)
from service.rootcause import (
    LEADING_SHARE,
    UNGROUPED,
    GroupContext,
    GroupFinder,
    cause_mix,
    find_groups,
    group_row,
)
from service.rootcause_input import (
    event_times,
    parse_time,
    read_events,
    screen_rows,
    window_mask,
)
from service.storage import atomic_directory
from service.tables import write_table
from service.tracking import (
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
    "Model estimates, not a diagnosis. Groups, reason codes and events avoidable come from a "
    "statistical model of past data; they show associations and may be wrong. Where food or "
    "equipment safety is at stake, follow the codes and rules that apply locally and have a "
    "licensed technician inspect the equipment before acting."
)
STEPS = 6


@dataclass(frozen=True)
class RootCauseOptions:
    predicted: bool = False
    since: str | None = None
    until: str | None = None
    previous: Path | None = None
    min_group_size: int | None = None


@dataclass(frozen=True)
class JobStart:
    """Options checked before any work: the window and the previous run's groups."""

    since: pd.Timestamp | None
    until: pd.Timestamp | None
    previous: PreviousRun | None


@dataclass(frozen=True)
class SelectedEvents:
    """The selected events, explained: what every engine hands to :func:`finish_rootcause`.

    ``events`` holds their input rows (index 0..n-1); ``reference`` the feature rows co-driver
    shifts of the fix simulation are fitted on (:mod:`service.rootcause_fix`).
    """

    events: pd.DataFrame
    times: pd.Series
    explanation: Explanation
    reference: np.ndarray
    rejects: pd.DataFrame
    time_column: str | None
    rows_read: int
    rows_in_window: int


@dataclass(frozen=True)
class Grouping:
    """Each selected event's group label (-1 ungrouped), strength and how they were found."""

    labels: np.ndarray
    strength: np.ndarray
    parameters: dict[str, Any]


@dataclass(frozen=True)
class RootCauseResult:
    groups: pd.DataFrame
    event_groups: pd.DataFrame
    summary: dict[str, Any]


def _quiet(message: str) -> None:
    """The default progress sink: say nothing."""


def run_rootcause(
    bundle: Bundle,
    events_path: Path,
    out: Path,
    options: RootCauseOptions | None = None,
    progress=_quiet,  # type: ignore[no-untyped-def]
) -> RootCauseResult:
    """Group the selected events and write the outputs into ``out``."""
    options = options or RootCauseOptions()
    out = Path(out)
    start = start_rootcause(out, options)
    since, until = start.since, start.until

    if is_prediction_log(events_path) and not options.predicted:
        raise DataError(
            f"{events_path}: a prediction log has no labels; pass --predicted to group rows "
            "scored at or above the threshold"
        )
    progress(f"step 1/{STEPS}: reading {events_path}")
    source = read_events(bundle, events_path)
    times = event_times(source)
    window = window_mask(times, since, until, source.time_column)
    table = source.table[window]
    times = times.loc[table.index]

    progress(f"step 2/{STEPS}: selecting events among {len(table):,} rows")
    screened = screen_rows(
        bundle, table, source.rows[window], source.rejects, options.predicted,
        f"{events_path}: ",
    )
    rejects, reference, selected = screened.rejects, screened.reference, screened.selected
    table, times = table[screened.keep], times[screened.keep]
    events = table[selected].reset_index(drop=True)
    times = times[selected].reset_index(drop=True)

    progress(f"step 3/{STEPS}: explaining {len(events):,} events")
    explainer = Explainer(bundle)
    explanation = explainer.explain(events)
    mix, has_cause = cause_mix(explanation.code_contributions)

    progress(f"step 4/{STEPS}: clustering")
    finder = GroupFinder(min_cluster_size=options.min_group_size).fit(mix, has_cause)
    selection = SelectedEvents(
        events=events, times=times, explanation=explanation, reference=reference,
        rejects=rejects, time_column=source.time_column,
        rows_read=len(source.table) + len(source.rejects), rows_in_window=len(table),
    )
    grouping = Grouping(finder.labels_, finder.strength_, {
        "min_cluster_size": finder.min_cluster_size_, "min_samples": finder.min_samples_,
    })
    return finish_rootcause(bundle, events_path, out, options, start, selection, grouping, progress)


def start_rootcause(out: Path, options: RootCauseOptions) -> JobStart:
    """Check the options and the output folder before any work, so a bad flag fails at once."""
    _check_out(Path(out))
    if options.min_group_size is not None and options.min_group_size < 2:
        raise DataError("--min-group-size must be at least 2")
    return JobStart(
        since=parse_time(options.since, "--since"),
        until=parse_time(options.until, "--until"),
        previous=read_previous(options.previous) if options.previous else None,
    )


def finish_rootcause(
    bundle: Bundle,
    events_path: Path,
    out: Path,
    options: RootCauseOptions,
    start: JobStart,
    selection: SelectedEvents,
    grouping: Grouping,
    progress=_quiet,  # type: ignore[no-untyped-def]
) -> RootCauseResult:
    """Describe, track and write the groups: the part every engine shares."""
    events, times, explanation = selection.events, selection.times, selection.explanation
    reference, rejects = selection.reference, selection.rejects
    since, until = start.since, start.until
    labels, strength = grouping.labels, grouping.strength
    catalogue = ReasonCatalogue(bundle.spec, bundle.manifest.stats)
    codes = catalogue.code_ids
    spec = bundle.spec
    threshold = bundle.manifest.decision.threshold
    mix, _ = cause_mix(explanation.code_contributions)
    found = find_groups(mix, labels, codes)
    total = max(len(events), 1)
    shares = [g.members.size / total for g in found]
    tracked = track([g.signature for g in found], shares, start.previous)

    progress(f"step 5/{STEPS}: describing {len(found)} groups and simulating their fixes")
    entity = events[spec.entity] if spec.entity and spec.entity in events.columns else None
    context = GroupContext(
        bundle=bundle, catalogue=catalogue, table=events, explanation=explanation,
        times=times, reference=reference, entity=entity,
    )
    rows = []
    for position, group in enumerate(found):
        row = {
            "group_id": tracked.ids[position],
            "status": tracked.status[position],
            "share": shares[position],
            "previous_share": tracked.previous_share[position],
        }
        row.update(group_row(context, group, strength))
        rows.append(row)
    groups = _group_frame(rows, labels, len(events))
    group_of = np.full(len(events), UNGROUPED, dtype=object)
    for position, group in enumerate(found):
        group_of[group.members] = tracked.ids[position]
    event_groups = _event_frame(explanation, group_of, strength, entity, times)

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
            "first_event": _iso(times.min()),
            "last_event": _iso(times.max()),
        },
        "counts": {
            "rows_read": selection.rows_read,
            "rejected": len(rejects),
            "rows_in_window": selection.rows_in_window,
            "events": len(events),
            "grouped": int((labels >= 0).sum()),
            "ungrouped": int((labels < 0).sum()),
            "groups": len(found),
            "events_with_warnings": sum(1 for w in explanation.warnings if w),
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
            tracked.ids, shares, [g.members.size for g in found],
            [r["label"] for r in rows], [g.signature for g in found],
        ),
        "gone": [
            {"group_id": g.group_id, "label": g.label, "previous_share": g.share,
             "previous_events": g.events}
            for g in tracked.gone
        ],
        "caution": CAUTION,
    }

    progress(f"step 6/{STEPS}: writing {out}")
    report = htmlreport.ReportData(
        title=f"Root-cause groups: {bundle.name}",
        summary=summary,
        groups=groups,
        heatmap=_heatmap(found, tracked.ids, codes),
        weekly=_weekly(event_groups, times),
        examples=_examples(found, tracked.ids, explanation, strength),
        caution=CAUTION,
    )
    with atomic_directory(out) as staging:
        write_table(escape_frame(groups), staging / GROUPS)
        write_table(escape_frame(event_groups), staging / EVENT_GROUPS)
        htmlreport.write_report(report, staging / REPORT)
        write_rejects(rejects, staging / REJECTS)
        (staging / SUMMARY).write_text(
            json.dumps(summary, indent=2, ensure_ascii=False, allow_nan=False) + "\n", "utf-8"
        )
    return RootCauseResult(groups=groups, event_groups=event_groups, summary=summary)


def _check_out(out: Path) -> None:
    """Refuse to replace a folder that is not an earlier run's output (it would be deleted)."""
    if not out.exists():
        return
    if not out.is_dir() or (any(out.iterdir()) and not (out / SUMMARY).is_file()):
        raise DataError(
            f"{out} exists and is not a root-cause output folder; refusing to replace it"
        )


def _group_frame(rows: list[dict[str, Any]], labels: np.ndarray, events: int) -> pd.DataFrame:
    frame = pd.DataFrame(rows, columns=GROUP_COLUMNS)
    frame = frame.sort_values("events", ascending=False, kind="stable")
    ungrouped = int((labels < 0).sum())
    tail = pd.DataFrame([{
        "group_id": UNGROUPED,
        "label": "ungrouped: no shared mix of causes",
        "events": ungrouped,
        "share": ungrouped / max(events, 1),
        "drivers": "",
        "fix_action": "",
        "events_avoidable_model_estimate": None,
    }], columns=GROUP_COLUMNS)
    frame = tail if frame.empty else pd.concat([frame, tail], ignore_index=True)
    for column in ("share", "previous_share"):
        frame[column] = frame[column].astype(float).round(4)
    for column in [c for c in GROUP_COLUMNS if c.endswith(("_contribution", "_estimate"))]:
        frame[column] = frame[column].astype(float).round(3)
    return frame.reset_index(drop=True)


GROUP_COLUMNS = [
    "group_id", "label", "status", "events", "share", "previous_share",
    "code_1", "code_1_mean_contribution", "code_2", "code_2_mean_contribution",
    "code_3", "code_3_mean_contribution",
    "driver_values", "drivers", "fix_code", "fix_kind", "fix_action", "fix_simulated",
    "events_avoidable_model_estimate", "first_event", "last_event", "top_entities",
    "example_event_ids",
]


def _event_frame(explanation, group_of, strength, entity, times) -> pd.DataFrame:  # type: ignore[no-untyped-def]
    columns: dict[str, Any] = {
        "event_id": explanation.ids,
        "group_id": group_of,
        "membership_strength": np.round(strength, 4),
        "probability": np.round(explanation.probability, 6),
        "top_reason_codes": ["; ".join(r.code for r in reasons) for reasons in explanation.reasons],
    }
    if entity is not None:
        columns["entity"] = entity.astype("string").to_numpy()
    columns["event_time"] = [_iso(t) for t in times]
    return pd.DataFrame(columns)


def _heatmap(found, ids, codes) -> pd.DataFrame:  # type: ignore[no-untyped-def]
    """Groups x codes: each group's mean share of each code, codes used by any group only."""
    frame = pd.DataFrame(
        [[g.signature.get(c, 0.0) for c in codes] for g in found], index=ids, columns=codes
    )
    if frame.empty:
        return frame
    return frame.sort_index().loc[:, frame.max(axis=0) >= 0.02]


def _weekly(event_groups: pd.DataFrame, times: pd.Series) -> pd.DataFrame:
    """Events per group and week (weeks start on Monday, UTC)."""
    known = times.notna().to_numpy()
    if not known.any():
        return pd.DataFrame()
    day = times[known].dt.tz_convert("UTC").dt.floor("D")
    week = (day - pd.to_timedelta(day.dt.day_of_week, unit="D")).dt.tz_localize(None)
    frame = pd.DataFrame({"group_id": event_groups["group_id"][known].to_numpy(), "week": week})
    return frame.groupby(["week", "group_id"]).size().unstack(fill_value=0).sort_index()


def _examples(found, ids, explanation, strength) -> list[htmlreport.Example]:  # type: ignore[no-untyped-def]
    out = []
    for group, group_id in sorted(zip(found, ids, strict=True), key=lambda pair: pair[1]):
        row = int(group.members[np.argmax(strength[group.members])])
        out.append(htmlreport.Example(
            group_id=group_id,
            event_id=explanation.ids[row],
            probability=float(explanation.probability[row]),
            reasons=[(r.code, r.text, r.contribution) for r in explanation.reasons[row]],
        ))
    return out


def _iso(stamp: Any) -> str | None:
    return None if stamp is None or pd.isna(stamp) else pd.Timestamp(stamp).isoformat()
