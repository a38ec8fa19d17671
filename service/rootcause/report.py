"""report.html: the root-cause run as one offline page, through the shared report kit.

This module turns the run's tables into the rows the ``rootcause.html`` template shows; the
kit (``causeline.service.report``) owns the page, its style sheet and the charts.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from causeline.service.report import charts, write_page
from causeline.service.report.page import blank, when
from causeline.service.rootcause.grouping import UNGROUPED


@dataclass(frozen=True)
class Example:
    """One event shown in full for a group: its reasons as (code, text, log-odds)."""

    group_id: str
    event_id: str
    probability: float
    reasons: list[tuple[str, str, float]]


@dataclass(frozen=True)
class ReportData:
    title: str
    summary: dict[str, Any]
    groups: pd.DataFrame
    heatmap: pd.DataFrame
    weekly: pd.DataFrame
    examples: list[Example] = field(default_factory=list)
    caution: str = ""


def write_report(data: ReportData, path: Path) -> None:
    """Render and write the page atomically."""
    write_page(path, "rootcause.html", **context(data))


def context(data: ReportData) -> dict[str, Any]:
    """Everything the template shows, as plain values."""
    summary = data.summary
    counts = summary.get("counts", {})
    window = summary.get("window", {})
    bundle = summary.get("bundle", {})
    selection = (
        "events scored at or above the threshold"
        if summary.get("selection") == "predicted"
        else "actual events (label column)"
    )
    facts = [
        ("events grouped", f"{counts.get('events', 0):,}"),
        ("groups", f"{counts.get('groups', 0):,}"),
        ("ungrouped", f"{counts.get('ungrouped', 0):,}"),
        ("gone since last run", f"{len(summary.get('gone', [])):,}"),
    ]
    # Input the run did not group, so a reader of the report alone knows it exists.
    if counts.get("rejected"):
        facts.append(("rows rejected (rejects.csv)", f"{counts['rejected']:,}"))
    if counts.get("repeats_dropped"):
        facts.append(("repeated log entries dropped", f"{counts['repeats_dropped']:,}"))
    if counts.get("snapshots_before_counted_failures"):
        facts.append(("earlier snapshots of counted failures",
                      f"{counts['snapshots_before_counted_failures']:,}"))
    return {
        "title": data.title,
        "subtitle": _subtitle(bundle, selection, window, summary.get("created", "")),
        "facts": facts,
        "caution": data.caution,
        "groups": [_group_row(record) for record in data.groups.to_dict("records")],
        "heatmap": charts.heatmap(data.heatmap, label="groups by reason codes"),
        "weekly": charts.strips(
            data.weekly, label="events per week by group",
            muted=[UNGROUPED],
        ),
        "examples": [_example(example) for example in data.examples],
        "gone": summary.get("gone", []),
        "min_group_size": summary.get("parameters", {}).get("min_group_size", ""),
    }


def _subtitle(bundle: dict[str, Any], selection: str, window: dict[str, Any],
              created: Any) -> str:
    first, last = when(window.get("first_event")), when(window.get("last_event"))
    span = f" · {first} to {last}" if first and last else ""
    return (f"Model {bundle.get('name', '')} version {bundle.get('version', '')} · "
            f"{selection}{span} · written {created}")


def _group_row(record: dict[str, Any]) -> dict[str, Any]:
    codes = []
    for rank in (1, 2, 3):
        code = record.get(f"code_{rank}")
        if isinstance(code, str) and code:
            codes.append((code, float(record.get(f"code_{rank}_mean_contribution") or 0.0)))
    share = float(record.get("share") or 0.0)
    top = record.get("top_entities")
    return {
        "group_id": record.get("group_id"),
        "label": record.get("label"),
        "status": record.get("status") if isinstance(record.get("status"), str) else "",
        "events": int(record.get("events") or 0),
        "share": share,
        "bar_px": max(2.0, 80 * share),
        "codes": codes,
        "driver_values": record.get("driver_values"),
        "fix_kind": record.get("fix_kind"),
        "fix_action": record.get("fix_action"),
        "drivers": record.get("drivers"),
        "avoidable": record.get("events_avoidable_model_estimate"),
        "fix_simulated": record.get("fix_simulated"),
        "action": record.get("action_most_common"),
        "action_below": record.get("action_below_threshold_share"),
        "action_examined": record.get("action_events_examined"),
        "first_event": record.get("first_event"),
        "last_event": record.get("last_event"),
        "top_entities": [] if blank(top) else str(top).split("; "),
    }


def _example(example: Example) -> dict[str, Any]:
    peak = max((abs(c) for _, _, c in example.reasons), default=1.0) or 1.0
    return {
        "group_id": example.group_id,
        "event_id": example.event_id,
        "probability": example.probability,
        "reasons": [(code, text, contribution, max(2.0, 240 * abs(contribution) / peak))
                    for code, text, contribution in example.reasons],
    }
