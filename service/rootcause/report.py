"""report.html: one self-contained page for a root-cause run, readable offline.

Inline CSS and inline SVG drawn here (no scripts, fonts, images or links to fetch), so the page
can be mailed or archived as one file. Every piece of text from data goes through
``html.escape``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from html import escape
from pathlib import Path
from typing import Any

import pandas as pd

from causeline.service.files.storage import atomic_file

# Our own palette: ink, paper, one accent for groups, a warm tone for cautions.
INK = "#1d2a33"
MUTED = "#5b6b75"
ACCENT = "#0f6e6a"
ACCENT_LIGHT = "#d8ecea"
WARN_BG = "#fff4de"
WARN_EDGE = "#c98a12"
STATUS_COLOURS = {
    "new": "#3559a8",
    "growing": "#b0412e",
    "shrinking": "#2f7d3b",
    "steady": "#5b6b75",
}

CSS = f"""
body {{ font: 14px/1.45 system-ui, -apple-system, 'Segoe UI', sans-serif; color: {INK};
  margin: 0; background: #f6f7f5; }}
main {{ max-width: 1220px; margin: 0 auto; padding: 24px 28px 48px; }}
header {{ border-bottom: 3px solid {ACCENT}; padding-bottom: 12px; margin-bottom: 18px; }}
h1 {{ font-size: 24px; margin: 0 0 4px; }}
h2 {{ font-size: 17px; margin: 30px 0 8px; color: {ACCENT}; }}
.meta {{ color: {MUTED}; font-size: 13px; }}
.facts {{ display: flex; gap: 12px; flex-wrap: wrap; margin: 14px 0; }}
.fact {{ background: #fff; border: 1px solid #dde2df; border-radius: 6px; padding: 8px 14px; }}
.fact b {{ display: block; font-size: 20px; }}
.caution {{ background: {WARN_BG}; border-left: 5px solid {WARN_EDGE}; padding: 10px 14px;
  margin: 12px 0; }}
table.groups {{ border-collapse: collapse; width: 100%; background: #fff; font-size: 13px; }}
table.groups th {{ text-align: left; background: {ACCENT_LIGHT}; padding: 6px 8px;
  position: sticky; top: 0; }}
table.groups td {{ border-top: 1px solid #e3e7e5; padding: 6px 8px; vertical-align: top; }}
.nowrap {{ white-space: nowrap; }}
td.num {{ text-align: right; white-space: nowrap; font-variant-numeric: tabular-nums; }}
.id {{ font-family: ui-monospace, 'SFMono-Regular', Consolas, monospace; white-space: nowrap; }}
.badge {{ color: #fff; border-radius: 3px; padding: 1px 6px; font-size: 11px; }}
.bar {{ background: {ACCENT}; height: 6px; border-radius: 3px; margin-top: 3px; }}
.small {{ font-size: 12px; color: {MUTED}; }}
.panel {{ background: #fff; border: 1px solid #dde2df; border-radius: 6px; padding: 12px;
  overflow-x: auto; }}
.examples {{ display: grid; grid-template-columns: repeat(auto-fill, minmax(360px, 1fr));
  gap: 12px; }}
.example h3 {{ font-size: 14px; margin: 0 0 6px; }}
.reason {{ margin: 6px 0; }}
.reason .code {{ font-weight: 600; }}
footer {{ margin-top: 36px; font-size: 12px; color: {MUTED}; }}
"""


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
    with atomic_file(path) as temporary:
        temporary.write_text(render(data), "utf-8")


def render(data: ReportData) -> str:
    summary = data.summary
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{escape(data.title)}</title><style>{CSS}</style></head><body><main>",
        _header(data),
        f'<div class="caution"><b>Caution.</b> {escape(data.caution)}</div>',
        "<h2>Groups</h2>",
        _group_table(data.groups),
        "<h2>Reason codes by group</h2>",
        '<p class="small">Each cell: the code\'s mean share of the group\'s mix of causes '
        "(positive contributions only, each event's adding up to 100 %).</p>",
        f'<div class="panel">{heatmap_svg(data.heatmap)}</div>',
        "<h2>Group sizes over time</h2>",
        '<p class="small">Events per week (weeks start on Monday, UTC).</p>',
        f'<div class="panel">{weekly_svg(data.weekly)}</div>',
        "<h2>One example per group</h2>",
        '<p class="small">The event most firmly inside each group, with its reason codes '
        "(contributions in log-odds of the model's score).</p>",
        _examples(data.examples),
        _gone(summary.get("gone", [])),
        _footer(summary),
        "</main></body></html>",
    ]
    return "\n".join(parts)


def _header(data: ReportData) -> str:
    s = data.summary
    counts = s.get("counts", {})
    window = s.get("window", {})
    bundle = s.get("bundle", {})
    selection = (
        "events scored at or above the threshold"
        if s.get("selection") == "predicted"
        else "actual events (label column)"
    )
    first, last = _when(window.get("first_event")), _when(window.get("last_event"))
    span = f" · {first} to {last}" if first and last else ""
    facts = [
        ("events grouped", f"{counts.get('events', 0):,}"),
        ("groups", f"{counts.get('groups', 0):,}"),
        ("ungrouped", f"{counts.get('ungrouped', 0):,}"),
        ("gone since last run", f"{len(s.get('gone', [])):,}"),
    ]
    # Input the run did not group, so a reader of the report alone knows it exists.
    if counts.get("rejected"):
        facts.append(("rows rejected (rejects.csv)", f"{counts['rejected']:,}"))
    if counts.get("repeats_dropped"):
        facts.append(("repeated log entries dropped", f"{counts['repeats_dropped']:,}"))
    if counts.get("snapshots_before_counted_failures"):
        facts.append(("earlier snapshots of counted failures",
                      f"{counts['snapshots_before_counted_failures']:,}"))
    fact_html = "".join(f'<div class="fact"><b>{escape(v)}</b>{escape(k)}</div>' for k, v in facts)
    return (
        f"<header><h1>{escape(data.title)}</h1>"
        f'<div class="meta">Model {escape(str(bundle.get("name", "")))} '
        f'version {escape(str(bundle.get("version", "")))} · {escape(selection)}'
        f"{span} · written {escape(str(s.get('created', '')))}</div></header>"
        f'<div class="facts">{fact_html}</div>'
    )


def _cell(value: Any) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    return escape(str(value))


def _group_table(groups: pd.DataFrame) -> str:
    if groups.empty:
        return "<p>No events were selected.</p>"
    head = (
        "<tr><th>Group</th><th>Status</th><th>Events</th><th>Leading reason codes</th>"
        "<th>Driver values (group vs fleet)</th><th>Suggested fix</th>"
        "<th>Events avoidable<br><span class='small'>of the group's events; model "
        "estimate</span></th>"
        "<th>First / last</th><th>Most affected</th></tr>"
    )
    rows = []
    for record in groups.to_dict("records"):
        status = record.get("status")
        badge = (
            f'<span class="badge" style="background:{STATUS_COLOURS.get(status, MUTED)}">'
            f"{escape(status)}</span>"
            if isinstance(status, str) and status
            else ""
        )
        share = float(record.get("share") or 0.0)
        codes = []
        for rank in (1, 2, 3):
            code = record.get(f"code_{rank}")
            if isinstance(code, str) and code:
                mean = record.get(f"code_{rank}_mean_contribution")
                codes.append(f"{escape(code)} <span class='small'>{float(mean):+.2f}</span>")
        fix = ""
        if isinstance(record.get("fix_kind"), str) and record["fix_kind"]:
            fix = f"<b>{escape(record['fix_kind'])}</b>: "
        fix += _cell(record.get("fix_action"))
        avoidable = record.get("events_avoidable_model_estimate")
        drivers = _cell(record.get("drivers"))
        estimate = (
            ""
            if avoidable is None or (isinstance(avoidable, float) and math.isnan(avoidable))
            else f"{float(avoidable):.1f}"
        )
        rows.append(
            "<tr>"
            f'<td><span class="id">{_cell(record.get("group_id"))}</span><br>'
            f"{_cell(record.get('label'))}</td>"
            f"<td>{badge}</td>"
            f'<td class="num">{int(record.get("events") or 0):,}<br>'
            f'<span class="small">{100 * share:.1f} %</span>'
            f'<div class="bar" style="width:{max(2.0, 80 * share):.0f}px"></div></td>'
            f"<td>{'<br>'.join(codes)}</td>"
            f'<td class="small">{_cell(record.get("driver_values"))}</td>'
            f"<td>{fix}<br><span class='small'>{drivers}</span></td>"
            f'<td class="num">{estimate}<br><span class="small">'
            f"{_cell(record.get('fix_simulated'))}</span></td>"
            f'<td class="small nowrap">{_when(record.get("first_event"))}<br>'
            f"{_when(record.get('last_event'))}</td>"
            f'<td class="small nowrap">{_lines(record.get("top_entities"))}</td>'
            "</tr>"
        )
    return f'<div class="panel"><table class="groups">{head}{"".join(rows)}</table></div>'


def _when(value: Any) -> str:
    """An ISO time as a short 'YYYY-MM-DD HH:MM' (UTC), escaped."""
    if not isinstance(value, str) or not value:
        return ""
    try:
        stamp = pd.Timestamp(value)
    except ValueError:
        return escape(value)
    if stamp.tzinfo is not None:
        stamp = stamp.tz_convert("UTC")
    return escape(stamp.strftime("%Y-%m-%d %H:%M"))


def _lines(value: Any) -> str:
    """A '; '-separated list as one escaped item per line."""
    return "<br>".join(escape(part) for part in str(value).split("; ")) if _cell(value) else ""


def _shade(value: float) -> str:
    """White to the accent colour as ``value`` goes from 0 to 1."""
    value = min(max(value, 0.0), 1.0)
    start, end = (255, 255, 255), (15, 110, 106)
    rgb = [round(a + (b - a) * math.sqrt(value)) for a, b in zip(start, end, strict=True)]
    return "#" + "".join(f"{c:02x}" for c in rgb)


def heatmap_svg(matrix: pd.DataFrame) -> str:
    """Groups (rows) x reason codes (columns), shaded by share, with the share printed."""
    if matrix.empty:
        return "<p>No groups.</p>"
    cell_w, cell_h, left, top = 62, 26, 90, 150
    # Column labels lean right, so the last one needs room beyond the grid.
    width = left + cell_w * matrix.shape[1] + 120
    height = top + cell_h * matrix.shape[0] + 10
    out = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
        f'role="img" aria-label="groups by reason codes" font-size="11" '
        f'font-family="system-ui, sans-serif">'
    ]
    for j, code in enumerate(matrix.columns):
        x = left + j * cell_w + cell_w / 2
        out.append(
            f'<text transform="translate({x:.0f},{top - 6}) rotate(-50)" fill="{INK}">'
            f"{escape(str(code))}</text>"
        )
    for i, group in enumerate(matrix.index):
        y = top + i * cell_h
        out.append(
            f'<text x="{left - 8}" y="{y + cell_h / 2 + 4:.0f}" text-anchor="end" '
            f'font-family="ui-monospace, monospace" fill="{INK}">{escape(str(group))}</text>'
        )
        for j, value in enumerate(matrix.iloc[i].to_numpy(dtype=float)):
            x = left + j * cell_w
            colour = "#fff" if value > 0.45 else INK
            label = f"{100 * value:.0f}%" if value >= 0.005 else ""
            out.append(
                f'<rect x="{x}" y="{y}" width="{cell_w - 2}" height="{cell_h - 2}" '
                f'fill="{_shade(value)}" stroke="#e3e7e5"/>'
                f'<text x="{x + cell_w / 2 - 1:.0f}" y="{y + cell_h / 2 + 4:.0f}" '
                f'text-anchor="middle" fill="{colour}">{label}</text>'
            )
    out.append("</svg>")
    return "".join(out)


def weekly_svg(weekly: pd.DataFrame) -> str:
    """One strip of weekly bars per group, on a shared time axis and a per-strip scale."""
    if weekly.empty:
        return "<p>No event times to show.</p>"
    weeks = list(weekly.index)
    groups = list(weekly.columns)
    left, strip, gap, right = 110, 34, 8, 60
    bar = max(2.0, min(14.0, 900 / max(len(weeks), 1)))
    width = left + bar * len(weeks) + right
    height = (strip + gap) * len(groups) + 30
    out = [
        f'<svg xmlns="http://www.w3.org/2000/svg" width="{width:.0f}" height="{height}" '
        f'role="img" aria-label="events per week by group" font-size="11" '
        f'font-family="system-ui, sans-serif">'
    ]
    for i, group in enumerate(groups):
        counts = weekly[group].to_numpy(dtype=float)
        peak = max(counts.max(), 1.0)
        y0 = i * (strip + gap)
        base = y0 + strip
        colour = MUTED if str(group).endswith("UNGROUPED") else ACCENT
        out.append(
            f'<text x="{left - 8}" y="{base - 10}" text-anchor="end" '
            f'font-family="ui-monospace, monospace" fill="{INK}">{escape(str(group))}</text>'
            f'<line x1="{left}" x2="{left + bar * len(weeks):.0f}" y1="{base}" y2="{base}" '
            f'stroke="#c9d0cc"/>'
            f'<text x="{left + bar * len(weeks) + 6:.0f}" y="{base - 10}" fill="{MUTED}">'
            f"max {int(peak)}</text>"
        )
        for j, count in enumerate(counts):
            if count <= 0:
                continue
            h = (strip - 4) * count / peak
            out.append(
                f'<rect x="{left + j * bar:.1f}" y="{base - h:.1f}" width="{bar * 0.85:.1f}" '
                f'height="{h:.1f}" fill="{colour}"><title>{escape(str(group))} '
                f"week of {pd.Timestamp(weeks[j]).date()}: {int(count)}</title></rect>"
            )
    axis_y = len(groups) * (strip + gap) + 14
    step = max(1, len(weeks) // 8)
    for j in range(0, len(weeks), step):
        out.append(
            f'<text x="{left + j * bar:.1f}" y="{axis_y}" fill="{MUTED}">'
            f"{escape(str(pd.Timestamp(weeks[j]).date()))}</text>"
        )
    out.append("</svg>")
    return "".join(out)


def _examples(examples: list[Example]) -> str:
    if not examples:
        return "<p>No groups.</p>"
    cards = []
    for example in examples:
        peak = max((abs(c) for _, _, c in example.reasons), default=1.0) or 1.0
        reasons = "".join(
            f'<div class="reason"><span class="code">{escape(code)}</span> '
            f'<span class="small">{contribution:+.2f}</span><br>{escape(text)}'
            f'<div class="bar" style="width:{max(2.0, 240 * abs(contribution) / peak):.0f}px">'
            "</div></div>"
            for code, text, contribution in example.reasons
        ) or "<p class='small'>No reason above the reporting minimum.</p>"
        cards.append(
            f'<div class="panel example"><h3><span class="id">{escape(example.group_id)}</span>'
            f' · event <span class="id">{escape(example.event_id)}</span></h3>'
            f'<div class="small">probability {example.probability:.3f}</div>{reasons}</div>'
        )
    return f'<div class="examples">{"".join(cards)}</div>'


def _gone(gone: list[dict[str, Any]]) -> str:
    if not gone:
        return ""
    items = "".join(
        f"<li><span class='id'>{escape(str(g.get('group_id')))}</span> "
        f"{escape(str(g.get('label', '')))} (previous share "
        f"{100 * float(g.get('previous_share', 0.0)):.1f} %)</li>"
        for g in gone
    )
    return f"<h2>Groups gone since the previous run</h2><ul>{items}</ul>"


def _footer(summary: dict[str, Any]) -> str:
    parameters = summary.get("parameters", {})
    return (
        "<footer>Groups come from each event's mix of reason codes (context codes such as "
        "season or earlier failures left out): HDBSCAN finds candidate groups, candidates that "
        "share most of their mix are merged, and each event joins the nearest group. Ids are "
        "matched to the previous run by signature. Events avoidable re-scores each group's "
        "events with the catalogue's fix targets applied and adds up, per event, the share of "
        "its probability the fix removes: of these events, how many the fix would have "
        "prevented. A model estimate, not a promise. "
        f"Smallest group: {escape(str(parameters.get('min_group_size', '')))} events. "
        "Generated by causeline.</footer>"
    )
