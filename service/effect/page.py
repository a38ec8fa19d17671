"""The fix-effect page: the measured effects beside the model's, and per action kind the
treated and comparison rates week by week around the action (through the report kit)."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Any

from causeline.service.effect.design import FLEET
from causeline.service.report import charts, write_page

if TYPE_CHECKING:
    from causeline.service.effect.job import EffectResult


def write_report(path: Path, result: EffectResult, caution: str) -> None:
    table, counts = result.table, result.summary["counts"]
    labels = [f"{r.action_kind} ({r.fix_kind})" if r.fix_kind else r.action_kind
              for r in table.itertuples()]
    forest = charts.intervals(
        labels, table["effect_per_1000"], table["effect_low"], table["effect_high"],
        # The model's estimate only when there is one (a bundle was given): no legend for
        # a marker the chart never draws.
        reference=table["model_effect_per_1000"] if table["model_effect_per_1000"].notna().any()
        else None, label="effects per 1,000 entity-days",
        estimate_name="measured, with its interval", reference_name="model estimate",
        fmt="{:+.1f}")
    plots = []
    measured = set(table.loc[table["status"] == "measured", "action_kind"])
    for kind, weeks in result.weekly.groupby("action_kind", sort=False):
        if kind not in measured:
            continue
        chart = charts.lines(
            [int(w) for w in weeks["week"]],
            {"treated": weeks["treated_per_1000"].tolist(),
             "comparison": weeks["comparison_per_1000"].tolist()},
            label=f"{kind}: rates by week", x_name="weeks from the week of the action",
            y_name="events per 1,000 entity-days")
        plots.append((kind, chart))
    rows: list[dict[str, Any]] = table.to_dict("records")
    for row, label in zip(rows, labels, strict=True):
        row["label"] = label
    facts = [("entities", f"{counts['entities']:,}"), ("weeks", f"{counts['weeks']:,}"),
             ("events", f"{counts['events']:,}"),
             ("events per 1,000 entity-days", "" if counts["events_per_1000"] is None
              else f"{counts['events_per_1000']:.1f}"),
             ("measured", f"{int((table['status'] == 'measured').sum())} of {len(table)}")]
    options = result.summary["options"]
    resampled = result.summary["resampled"]
    unit = "entities" if resampled == "entity" else f"entities grouped by {resampled}"
    within = result.summary["compared_within"]
    write_page(path, "effect.html", title="Did the fix work?",
               subtitle=f"Weeks {counts['first_week']} to {counts['last_week']}; "
                        f"{options['before']} weeks before and {options['after']} after each "
                        f"action; {options['level']:.0%} intervals from "
                        f"{options['bootstrap']} bootstrap samples of {unit}"
                        + ("" if within == FLEET else f"; compared within {within}"),
               facts=facts, caution=caution, rows=rows, forest=forest, plots=plots,
               level=options["level"], before=options["before"], after=options["after"],
               within=None if within == FLEET else within)
