"""The fix-effect study as a command runs it: read the logs, measure each tracked action kind
against its comparison group, set the model's estimate beside it, write the outputs.

Outputs, in one folder written atomically: one CSV per fix kind (``coil-cleaning.csv``; a kind
of action no fix names gets its own), ``effects.csv`` with every row, ``weeks.csv`` (the rates
per week around the action, for the plots), ``summary.json`` and ``report.html``.

Where no honest number exists the row says why in ``warning`` and leaves every measured rate
and effect empty: too few treated or comparison entities, no entity left untreated in the
treated ones' weeks, or actions that follow failures.
"""

from __future__ import annotations

import json
import math
from dataclasses import asdict, dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from causeline.service.bundle.load import Bundle
from causeline.service.effect.design import FLEET, Stack, Window, stack
from causeline.service.effect.estimate import Rates, StackedDiD
from causeline.service.effect.link import Link, links
from causeline.service.effect.model import ModelCheck, ModelEstimate
from causeline.service.effect.panel import EntityWeeks, entity_weeks
from causeline.service.effect.trigger import Following, after_failures
from causeline.service.errors import DataError
from causeline.service.features.logs import (
    RawPaths,
    TimelineInputs,
    read_inputs,
    require_columns,
    timeline_of,
)
from causeline.service.files.spreadsheet import escape_frame
from causeline.service.files.storage import atomic_directory
from causeline.service.files.tables import write_table
from causeline.service.progress import Progress, Silent
from causeline.service.spec.dataset import DatasetSpec
from causeline.service.spec.timeline import TimelineSpec

EFFECTS = "effects.csv"
WEEKS = "weeks.csv"
SUMMARY = "summary.json"
REPORT = "report.html"
CAUTION = (
    "Measured on past logs, under assumptions the data cannot prove (parallel trends: without "
    "the action the treated entities' rate would have moved as the comparison's did). A fix "
    "that shows no effect here may still be needed for safety or by rule, and one that shows "
    "an effect is no licence to skip inspections. Where equipment or food safety is at stake, "
    "follow the codes and rules that apply locally, the equipment maker's instructions and "
    "licensed practice."
)
# Common practice, not a published threshold: cluster-bootstrap intervals from fewer clusters
# than about 30-50 tend to be too narrow (Cameron, Gelbach & Miller 2008; with few treated
# clusters, MacKinnon & Webb 2017, J. Applied Econometrics 32(2)).
FEW_CLUSTERS = 30
# A rule of thumb for the standardized difference of a baseline measure between treated and
# comparison (Stuart 2010, Statistical Science 25(1); quoted from memory).
UNBALANCED = 0.25
NOTES_JOINED_BY = "; "  # no note holds it, so a reader can split the column on it
MEASURED = ("treated_before_per_1000", "treated_after_per_1000", "comparison_before_per_1000",
            "comparison_after_per_1000", "effect_per_1000", "effect_low", "effect_high",
            "relative_change", "pretrend_per_1000", "pretrend_low", "pretrend_high",
            "balance_before")


@dataclass(frozen=True)
class EffectOptions:
    """The window in weeks, the bootstrap and what it resamples (``cluster_by``), the limits
    below which no number is given (``min_treated``, ``min_comparison``: the project's rule of
    thumb, a bootstrap over fewer entities is unreliable), and what counts as an action
    following a failure."""

    before: int = 6
    after: int = 6
    bootstrap: int = 999
    level: float = 0.95
    seed: int = 0
    min_treated: int = 10
    min_comparison: int = 10
    failure_days: float = 7.0
    failure_excess: float = 0.2
    # A column of the attributes whose entities the bootstrap resamples together; none: the
    # config's ``timeline.attributes.cluster_by``, else each entity alone.
    cluster_by: str | None = None
    # A column of the attributes within whose groups treated and comparison entities are
    # compared; none: the config's ``timeline.attributes.compare_within``, else the fleet;
    # "fleet": the fleet, whatever the config says.
    compare_within: str | None = None

    def check(self) -> None:
        if self.before < 1 or self.after < 1:
            raise DataError("--weeks-before and --weeks-after must be at least 1")
        if self.bootstrap < 99:
            raise DataError("--bootstrap must be at least 99 replicates")
        if not 0.5 <= self.level < 1:
            raise DataError("--level must be at least 0.5 and below 1")
        if self.min_treated < 2 or self.min_comparison < 2:
            raise DataError("--min-treated must be at least 2")
        if self.failure_days <= 0:
            raise DataError("--failure-days must be positive")


@dataclass(frozen=True)
class EffectResult:
    table: pd.DataFrame
    weekly: pd.DataFrame
    summary: dict[str, Any]


def study(
    spec: DatasetSpec, inputs: TimelineInputs, options: EffectOptions | None = None,
    bundle: Bundle | None = None, progress: Progress | None = None,
) -> EffectResult:
    """Measure every (action kind, fix) of the config on the logs; nothing is written."""
    options = options or EffectOptions()
    options.check()
    progress = progress or Silent()
    timeline = timeline_of(spec)
    if timeline.actions is None:
        raise DataError("the config's timeline has no actions section: there is no action "
                        "to measure")
    steps = 3 if bundle is not None else 2
    progress(f"step 1/{steps}: counting events and observed days per entity and week")
    panel = entity_weeks(timeline, inputs)
    check = None
    if bundle is not None:
        progress("step 2/3: scoring the bundle's snapshots for the model's estimate")
        check = ModelCheck(bundle, inputs, panel)
    unit, clusters = cluster_codes(timeline, inputs, panel, options.cluster_by)
    scope, within = group_codes(timeline, inputs, panel, options.compare_within)
    window = Window(options.before, options.after)
    rows, weekly, kinds = [], [], {}
    for link in links(spec):
        if link.action_kind not in kinds:
            progress(f"step {steps}/{steps}: measuring {link.action_kind}")
            built = stack(panel, link.action_kind, window, within)
            following = after_failures(
                panel, panel.actions[link.action_kind], options.failure_days,
                options.failure_excess, around=(7.0 * options.before, 7.0 * (options.after + 1)))
            fit = (StackedDiD(options.bootstrap, options.level, options.seed).fit(
                built, clusters) if built.cohort_weeks.size else None)
            kinds[link.action_kind] = (built, following, fit)
            if fit is not None:
                weekly.append(_weeks(link.action_kind, window, fit.weekly_))
        built, following, fit = kinds[link.action_kind]
        model = None
        if check is not None and link.fix_kind is not None:
            model = check.estimate(link.codes, built)
        rows.append(_row(link, built, following, fit, model, options, bundle is not None, unit,
                         scope))
    table = pd.DataFrame(rows)
    weeks = pd.concat(weekly, ignore_index=True) if weekly else pd.DataFrame(
        columns=["action_kind", "week", "treated_per_1000", "comparison_per_1000"])
    return EffectResult(table, weeks, _summary(panel, table, options, unit, scope))


def run_effect(
    spec: DatasetSpec, paths: RawPaths, out: Path, options: EffectOptions | None = None,
    bundle: Bundle | None = None, progress: Progress | None = None,
) -> EffectResult:
    """Read the raw logs, run :func:`study`, write the folder (atomically)."""
    options = options or EffectOptions()
    options.check()
    result = study(spec, read_inputs(spec, paths), options, bundle, progress)
    result.summary["inputs"] = {"logs": str(paths),
                                "bundle": None if bundle is None else str(bundle.path)}
    from causeline.service.effect.page import write_report

    with atomic_directory(Path(out)) as staging:
        write_table(escape_frame(result.table), staging / EFFECTS)
        for name, part in result.table.groupby("file", sort=False):
            write_table(escape_frame(part.drop(columns="file")), staging / f"{name}.csv")
        # Rates per 1,000 entity-days: three decimals are finer than any count behind them.
        write_table(result.weekly.round(3), staging / WEEKS)
        (staging / SUMMARY).write_text(
            json.dumps(result.summary, indent=2, ensure_ascii=False, allow_nan=False) + "\n",
            "utf-8")
        write_report(staging / REPORT, result, CAUTION + (" " + spec.caution if spec.caution
                                                           else ""))
    return result


def cluster_codes(timeline: TimelineSpec, inputs: TimelineInputs, panel: EntityWeeks,
                  column: str | None) -> tuple[str, np.ndarray | None]:
    """What the bootstrap resamples: the name of the unit (``entity`` or an attributes
    column) and per entity code its cluster label (none: each entity alone). The column is
    ``column``, else the config's ``attributes.cluster_by``; naming the attributes' entity
    column means each entity alone."""
    attributes = timeline.attributes
    column = column or (attributes.cluster_by if attributes is not None else None)
    if column is None or (attributes is not None and column == attributes.entity):
        return "entity", None
    return column, _attribute_codes(timeline, inputs, panel, column, "cluster by")


def group_codes(timeline: TimelineSpec, inputs: TimelineInputs, panel: EntityWeeks,
                column: str | None) -> tuple[str, np.ndarray | None]:
    """Within what comparisons are made: ``fleet`` (none) or an attributes column, and per
    entity code its group label. The column is ``column``, else the config's
    ``attributes.compare_within``; ``fleet`` compares across the fleet whatever the config
    says."""
    attributes = timeline.attributes
    column = column or (attributes.compare_within if attributes is not None else None)
    if column is None or column == FLEET:
        return FLEET, None
    if attributes is not None and column == attributes.entity:
        raise DataError(f"compare within {column!r}: that is the entity itself, and an entity "
                        "has no untreated twin; name a grouping of entities (a store, a line)")
    return column, _attribute_codes(timeline, inputs, panel, column, "compare within")


def _attribute_codes(timeline: TimelineSpec, inputs: TimelineInputs, panel: EntityWeeks,
                     column: str, purpose: str) -> np.ndarray:
    """Per entity code, the code of its value of the attributes' ``column``."""
    attributes = timeline.attributes
    if inputs.attributes is None or attributes is None:
        raise DataError(f"{purpose} {column!r} needs the attributes table: give it "
                        "(--attributes) and an attributes section in the config")
    frame = inputs.attributes
    if column not in frame.columns:
        raise DataError(f"{purpose} {column!r}: the attributes have no such column (they have "
                        f"{', '.join(map(str, frame.columns))})")
    require_columns(frame, "attributes", [attributes.entity])
    values = pd.Series(frame[column].to_numpy(), index=frame[attributes.entity].astype("string"))
    values = values[~values.index.duplicated()].reindex(panel.names)
    missing = values.isna().to_numpy()
    if missing.any():
        raise DataError(
            f"{int(missing.sum())} entities with readings have no {column!r} in the attributes "
            f"(first: {panel.names[missing][0]!r}); give every entity a value, or {purpose} "
            "another column")
    return pd.factorize(values.astype("string"))[0].astype(np.int64)


def _row(link: Link, built: Stack, following: Following, fit: StackedDiD | None,
         model: ModelEstimate | None, options: EffectOptions, with_bundle: bool, unit: str,
         scope: str) -> dict[str, Any]:
    warnings = _warnings(built, following, options, scope)
    notes = []
    row: dict[str, Any] = {
        "action_kind": link.action_kind, "fix_kind": link.fix_kind or "",
        "reason_codes": " ".join(link.codes), "linked_by": link.how,
        "status": "no estimate" if warnings or fit is None else "measured",
        "warning": "; ".join(warnings),
        "treated_entities": built.count(True), "treated_episodes": int(built.treated.sum()),
        "comparison_entities": built.count(False), "cohorts": int(built.cohort_weeks.size),
        "compared_within": scope,
        "cluster_by": unit, "clusters": 0 if fit is None else fit.clusters_,
        "treated_clusters": 0 if fit is None else fit.treated_clusters_,
        "weeks_before": options.before, "weeks_after": options.after,
    }
    rates: Rates | None = fit.rates_ if fit is not None else None
    for column in MEASURED:
        row[column] = float("nan")
    row["level"] = options.level
    if rates is not None and not warnings:
        row.update({
            "treated_before_per_1000": rates.treated_before,
            "treated_after_per_1000": rates.treated_after,
            "comparison_before_per_1000": rates.comparison_before,
            "comparison_after_per_1000": rates.comparison_after,
            "effect_per_1000": rates.effect, "effect_low": rates.low, "effect_high": rates.high,
            "relative_change": rates.relative, "pretrend_per_1000": rates.pretrend,
            "pretrend_low": rates.pretrend_low, "pretrend_high": rates.pretrend_high,
            "balance_before": rates.balance,
        })
        if rates.pretrend_low > 0 or rates.pretrend_high < 0:
            notes.append(
                f"the groups were drifting apart before the action: carried on, that drift "
                f"alone gives {rates.pretrend:+.1f} per 1,000 (interval "
                f"{rates.pretrend_low:+.1f} to {rates.pretrend_high:+.1f}), so parallel trends "
                "is in doubt: read the effect with care")
        if abs(rates.balance) > UNBALANCED:
            notes.append(
                f"the treated had {rates.treated_before:.1f} events per 1,000 before the action"
                f" and the comparison {rates.comparison_before:.1f} (standardized difference "
                f"{rates.balance:+.2f}, above {UNBALANCED}), and groups that start apart need "
                "not trend alike: read the effect with care")
        if fit is not None and fit.treated_clusters_ < FEW_CLUSTERS:
            notes.append(
                f"the interval resamples {fit.clusters_} clusters ({unit}), {fit.treated_clusters_}"
                f" of them with treated entities, and with fewer than about {FEW_CLUSTERS} "
                "treated clusters a bootstrap interval tends to be too narrow (common practice):"
                " read it with care")
        if math.isnan(rates.low):
            notes.append("too few bootstrap replicates had a usable block for an interval")
    if built.unmatched:
        where = "" if scope == FLEET else f" of the same {scope}"
        notes.append(f"{built.unmatched} treated episodes left out: no entity{where} went "
                     "without the action in their weeks")
    row["note"] = NOTES_JOINED_BY.join(notes)
    row.update({
        "model_effect_per_1000": float("nan") if model is None else model.effect,
        "model_snapshots": 0 if model is None else model.snapshots,
        "model_targets": "" if model is None else model.targets,
        "model_note": (model.note if model is not None else
                       "no catalogue fix names this kind of action" if link.fix_kind is None
                       else "" if with_bundle else "no bundle given (--bundle)"),
        "actions": built.actions, "episodes": built.episodes,
        "episodes_unmatched": built.unmatched, "actions_near_edge": built.edge,
        "actions_crowded": built.crowded,
        "share_after_failure": following.share, "share_by_chance": following.chance,
        "file": link.name,
    })
    return row


def _warnings(built: Stack, following: Following, options: EffectOptions, scope: str
              ) -> list[str]:
    out = []
    if following.follows:
        out.append(
            f"follows failures: {following.share:.0%} of these actions came within "
            f"{options.failure_days:g} days after a failure of the same entity, against "
            f"{following.chance:.0%} of the same entities' observed time; repairs after a "
            "breakdown are not a "
            "random fix, and the rate falling back after a bad spell would be credited to them")
    if built.episodes == 0:
        out.append(
            f"no usable action: none has {options.before} weeks of logs before its week and "
            f"{options.after} after, free of other actions of the kind")
    elif built.cohort_weeks.size == 0:
        where = "every other entity" if scope == FLEET else f"every other entity of its {scope}"
        out.append(
            f"no comparison group: in the weeks around every action, {where} had one too, so "
            "nothing separates the fix from the season"
            + ("" if scope == FLEET else " (compared within each group; "
               "--compare-within fleet compares across the fleet)"))
    else:
        treated, comparison = built.count(True), built.count(False)
        if treated < options.min_treated:
            out.append(f"too few treated entities: {treated} with a clean window, at least "
                       f"{options.min_treated} needed")
        if comparison < options.min_comparison:
            out.append(f"too few comparison entities: {comparison}, at least "
                       f"{options.min_comparison} needed")
    return out


def _weeks(kind: str, window: Window, weekly: dict[str, np.ndarray]) -> pd.DataFrame:
    return pd.DataFrame({
        "action_kind": kind, "week": np.arange(-window.before, window.after + 1),
        "treated_per_1000": weekly["treated"], "comparison_per_1000": weekly["comparison"],
    })


def _summary(panel: EntityWeeks, table: pd.DataFrame, options: EffectOptions, unit: str,
             scope: str) -> dict[str, Any]:
    records = json.loads(table.drop(columns="file").to_json(orient="records"))
    where = "across the fleet" if scope == FLEET else f"within each {scope}"
    observed = float(panel.days.sum())
    return {
        "generated_at": datetime.now(UTC).isoformat(timespec="seconds"),
        "method": "stacked difference-in-differences over entity-weeks, clean comparison "
                  f"entities per treatment week {where}, cluster bootstrap over {unit} "
                  "(docs/effect.md)",
        "resampled": unit,
        "compared_within": scope,
        "options": asdict(options),
        "counts": {"entities": int(panel.names.size), "weeks": panel.weeks,
                   "entity_days": observed, "events": int(panel.events.sum()),
                   "events_per_1000": 1000 * float(panel.events.sum()) / observed
                   if observed else None,
                   "first_week": str(panel.week_start(0).date()),
                   "last_week": str(panel.week_start(panel.weeks - 1).date())},
        "effects": records,
        "caution": CAUTION,
    }
