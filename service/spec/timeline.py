"""The ``timeline:`` section: how raw readings, failures, actions and attributes become labelled
snapshots (built by :mod:`causeline.service.features.snapshots`), and the feature names it makes.
"""

from __future__ import annotations

import re
from typing import Literal

from pydantic import Field, model_validator

from causeline.service.spec.base import NAME_PATTERN, Strict

Aggregation = Literal["last", "mean", "min", "max", "std", "slope", "count", "count_above",
                      "count_below", "vs_median"]
# Aggregations that describe the latest reading or the window's coverage itself: the coverage
# rules (min_coverage, min_readings) never blank them.
WHOLE_OR_NOT = ("last", "count")
CalendarPart = Literal["month", "weekday", "hour"]
# A span on a time clock: a number and a unit, e.g. 30m, 24h, 7d, 2w.
DURATION = re.compile(r"^(\d+(?:\.\d+)?)([smhdw])$")
UNIT_SECONDS = {"s": 1, "m": 60, "h": 3600, "d": 86_400, "w": 604_800}
# Columns the build adds beside the features (causeline.service.features.snapshots).
RESERVED = ("snapshot_status", "down_rule", "failure_time", "failure_counted")


def span_amount(span: str | float, clock: str) -> float:
    """A span in seconds (time clock) or cycles (cycle clock); ValueError if it does not fit."""
    if clock == "cycle":
        text = str(span).strip().lower().removesuffix("c")
        try:
            amount = float(text)
        except ValueError:
            raise ValueError(f"{span!r}: on a cycle clock a span is a number of cycles") from None
    elif isinstance(span, int | float) and span == 0:
        amount = 0.0
    else:
        match = DURATION.match(str(span).strip().lower())
        if match is None:
            raise ValueError(f"{span!r}: a span looks like 30m, 24h, 7d or 2w")
        amount = float(match.group(1)) * UNIT_SECONDS[match.group(2)]
    if amount < 0:
        raise ValueError(f"{span!r}: a span cannot be negative")
    return amount


def span_tag(span: str | float, clock: str) -> str:
    """The span as it appears in feature names: ``24h``, ``30c``, ``1p5h``."""
    if clock == "cycle":
        amount = span_amount(span, clock)
        text = f"{amount:g}c"
    else:
        text = str(span).strip().lower()
    return text.replace(".", "p")


class ReadingsInput(Strict):
    """The readings log: one row per entity per reading time."""

    entity: str
    time: str
    measurements: tuple[str, ...] = Field(min_length=1)
    # Columns whose latest value at or before a snapshot is copied as it is (e.g. firmware).
    states: tuple[str, ...] = ()


class FailuresInput(Strict):
    """The failure (event) log; ``types`` picks the event types to predict when it holds several."""

    entity: str
    time: str
    type_column: str | None = None
    types: tuple[str, ...] = ()
    # True: the timeline may come without a failure log (say, entities that have not failed
    # yet); every entity then counts as never failed. A log left out by mistake is an error.
    optional: bool = False

    @model_validator(mode="after")
    def _types(self) -> FailuresInput:
        if self.types and self.type_column is None:
            raise ValueError("types needs a type_column")
        return self


class ActionsInput(Strict):
    """The maintenance log; each listed kind gets a time-since feature."""

    entity: str
    time: str
    kind_column: str
    kinds: tuple[str, ...] = Field(min_length=1)


class AttributesInput(Strict):
    """Static attributes, one row per entity, joined onto every snapshot. ``cluster_by``
    names a column of the attributes file (listed in ``columns`` or not) whose entities share
    shocks, as the cases of one store share its air and its cleaning rota: the fix-effect
    study's bootstrap resamples them together. ``compare_within`` names such a column too:
    the study then compares each treated entity only with untreated entities of its own
    group (its store), so shocks the group shares fall out of the comparison."""

    entity: str
    columns: tuple[str, ...] = Field(min_length=1)
    cluster_by: str | None = None
    compare_within: str | None = None


class SnapshotCadence(Strict):
    """``every: reading``, or a period (``1d``, or cycles on a cycle clock), maybe ``at: HH:MM``."""

    every: str | float = "reading"
    at: str | None = Field(default=None, pattern=r"^([01]\d|2[0-3]):[0-5]\d$")


class Limit(Strict):
    """Separate limits for ``count_above`` and ``count_below`` on one measurement."""

    above: float | None = None
    below: float | None = None


class LookbackWindow(Strict):
    """A window ending at the snapshot: a span ``(t - span, t]`` or the last N readings.

    ``count_above`` counts readings strictly above the measurement's limit, ``count_below``
    strictly below it (a bare number serves both; ``{above: .., below: ..}`` sets each).
    ``min_coverage``: an aggregate is missing where the entity's history reaches back less
    than this share of the window (its first days); ``min_readings``: where the window holds
    fewer valid readings of the measurement. Neither blanks ``last`` or ``count``.
    """

    span: str | float | None = None
    readings: int | None = Field(default=None, ge=1)
    aggregations: tuple[Aggregation, ...] = Field(min_length=1)
    measurements: tuple[str, ...] | None = None
    limits: dict[str, float | Limit] = Field(default_factory=dict)
    min_coverage: float = Field(default=0.5, ge=0.0, le=1.0)
    min_readings: int = Field(default=1, ge=1)

    @model_validator(mode="after")
    def _one(self) -> LookbackWindow:
        if (self.span is None) == (self.readings is None):
            raise ValueError("give exactly one of span or readings")
        counting = {"count_above", "count_below"} & set(self.aggregations)
        if self.limits and not counting:
            raise ValueError("limits are for count_above and count_below; add one of them "
                             "to aggregations or remove limits")
        return self

    def limit(self, measurement: str, side: str) -> float | None:
        """The limit ``count_above`` (side ``above``) or ``count_below`` uses, if any."""
        value = self.limits.get(measurement)
        if value is None or isinstance(value, int | float):
            return value
        return value.above if side == "above" else value.below


class DownAfterFailure(Strict):
    """How long an entity counts as down (failed or under repair) after a failure at f.

    Down at least through ``f + after_failure`` (inclusive: a snapshot at the failure itself
    is always down); then until its readings resume (``until_readings``: the first reading
    after f) or an action of a kind in ``until_action`` is logged (snapshots strictly after it
    count again), whichever comes first; never longer than ``max`` after f, when set. Down
    snapshots are not labelled: an entity that is down cannot fail.
    """

    after_failure: str | float = 0.0
    until_readings: bool = True
    until_action: tuple[str, ...] = ()
    max: str | float | None = None


class DownRule(DownAfterFailure):
    """The ``down:`` section: the rule after a failure (``by_type`` per failure type where the
    types differ), and ``stale_after``: down whenever the entity's latest reading is older than
    this, failure or not (nothing is known of it then)."""

    stale_after: str | float | None = None
    by_type: dict[str, DownAfterFailure] = Field(default_factory=dict)

    def rules(self) -> list[DownAfterFailure]:
        """The default rule first, then one per type of ``by_type`` in its order."""
        default = DownAfterFailure(after_failure=self.after_failure,
                                   until_readings=self.until_readings,
                                   until_action=self.until_action, max=self.max)
        return [default, *self.by_type.values()]


class TimelineSpec(Strict):
    """How to build labelled snapshots from raw readings, failures, actions and attributes."""

    clock: Literal["time", "cycle"] = "time"
    # Unit of time-since features and of slopes on a time clock (cycle clocks use cycles).
    unit: Literal["m", "h", "d"] = "h"
    readings: ReadingsInput
    failures: FailuresInput
    actions: ActionsInput | None = None
    attributes: AttributesInput | None = None
    snapshots: SnapshotCadence = SnapshotCadence()
    horizon: str | float
    windows: tuple[LookbackWindow, ...] = ()
    calendar: tuple[CalendarPart, ...] = ()
    down: DownRule = DownRule()
    # Snapshots whose horizon runs past the end of observation without a failure: excluded, or
    # (only when asked for) kept as negatives.
    censored: Literal["exclude", "negative"] = "exclude"

    @model_validator(mode="after")
    def _check(self) -> TimelineSpec:
        spans = [("horizon", self.horizon), ("down.after_failure", self.down.after_failure)]
        spans += [(f"down.{key}", getattr(self.down, key)) for key in ("max", "stale_after")
                  if getattr(self.down, key) is not None]
        for kind, rule in self.down.by_type.items():
            spans.append((f"down.by_type.{kind}.after_failure", rule.after_failure))
            if rule.max is not None:
                spans.append((f"down.by_type.{kind}.max", rule.max))
        spans += [(f"windows[{i}].span", w.span) for i, w in enumerate(self.windows) if w.span]
        for where, span in spans:
            try:
                span_amount(span, self.clock)
            except ValueError as exc:
                raise ValueError(f"{where}: {exc}") from None
        if span_amount(self.horizon, self.clock) <= 0:
            raise ValueError("horizon: must be positive")
        if self.snapshots.every != "reading":
            try:
                period = span_amount(self.snapshots.every, self.clock)
            except ValueError as exc:
                raise ValueError(f"snapshots.every: 'reading' or a period; {exc}") from None
            if period <= 0:
                raise ValueError("snapshots.every: must be positive")
        if self.clock == "cycle" and (self.snapshots.at or self.calendar):
            raise ValueError("snapshots.at and calendar need a time clock")
        measured = set(self.readings.measurements)
        for index, window in enumerate(self.windows):
            for name in (*(window.measurements or ()), *window.limits):
                if name not in measured:
                    raise ValueError(f"windows[{index}]: {name!r} is not a measurement")
            for aggregation in ("count_above", "count_below"):
                if aggregation not in window.aggregations:
                    continue
                side = aggregation.removeprefix("count_")
                for name in window.measurements or self.readings.measurements:
                    if window.limit(name, side) is None:
                        raise ValueError(
                            f"windows[{index}]: {aggregation} needs a limit for {name!r}; "
                            f"add it to limits ({{{name}: <value>}}, or {{{name}: {{{side}: "
                            "<value>}}}) or list the measurements the window covers")
        kinds = set(self.actions.kinds) if self.actions else set()
        for where, rule in [("down", self.down),
                            *((f"down.by_type.{k}", r) for k, r in self.down.by_type.items())]:
            for kind in rule.until_action:
                if kind not in kinds:
                    raise ValueError(f"{where}.until_action: {kind!r} is not one of "
                                     f"actions.kinds ({', '.join(sorted(kinds)) or 'none'})")
        for kind in self.down.by_type:
            if self.failures.types and kind not in self.failures.types:
                raise ValueError(f"down.by_type: {kind!r} is not one of failures.types "
                                 f"({', '.join(self.failures.types)})")
            if self.failures.type_column is None:
                raise ValueError("down.by_type needs failures.type_column")
        names = self.feature_names
        for name in names:
            if not re.match(NAME_PATTERN, name):
                raise ValueError(f"feature name {name!r} is not a valid name; rename the column")
        for name in RESERVED:
            if name in names:
                raise ValueError(f"feature name {name!r} is the name of a column the build "
                                 "adds; rename the column")
        repeated = sorted({n for n in names if names.count(n) > 1})
        if repeated:
            raise ValueError(f"feature name {repeated[0]!r} would be built twice")
        return self

    @property
    def time_suffix(self) -> str:
        return "c" if self.clock == "cycle" else self.unit

    def window_tag(self, window: LookbackWindow) -> str:
        if window.readings is not None:
            return f"{window.readings}r"
        return span_tag(window.span or 0, self.clock)

    def window_features(self) -> list[tuple[str, int, str, Aggregation]]:
        """(feature name, window index, measurement, aggregation) in a fixed order."""
        out: list[tuple[str, int, str, Aggregation]] = []
        for index, window in enumerate(self.windows):
            tag = self.window_tag(window)
            for measurement in window.measurements or self.readings.measurements:
                for aggregation in window.aggregations:
                    out.append((f"{measurement}__{aggregation}_{tag}", index, measurement,
                                aggregation))
        return out

    def action_feature(self, kind: str) -> str:
        slug = re.sub(r"[^a-z0-9]+", "_", kind.lower()).strip("_")
        return f"since_{slug}_{self.time_suffix}"

    @property
    def missing_meanings(self) -> dict[str, str]:
        """What a missing value of a time-since feature means: nothing of its kind logged yet,
        a state of the entity, not a gap in the data."""
        out = {f"since_failure_{self.time_suffix}": "no failure logged"}
        for kind in self.actions.kinds if self.actions else ():
            out[self.action_feature(kind)] = f"no {kind} logged"
        return out

    @property
    def feature_names(self) -> list[str]:
        """Every column the builder adds, in order; a config's ``features`` refer to these."""
        names = [name for name, *_ in self.window_features()]
        names += list(self.readings.states)
        names += ["failures_before", f"since_failure_{self.time_suffix}"]
        kinds = self.actions.kinds if self.actions else ()
        names += [self.action_feature(kind) for kind in kinds]
        names += list(self.attributes.columns if self.attributes else ())
        names += list(self.calendar)
        return names
