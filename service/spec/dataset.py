"""What a data set means: its columns, features and reason-code catalogue.

The same models describe a data-set config (YAML, read by ``training``) and the spec stored in a
bundle's manifest (JSON, read here), so the two cannot drift apart. Validation errors name the
exact key, e.g. ``reason_codes[2].fix.targets: 'door_openings_per_h' is observable``.
"""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import Any, Literal, TypeVar

from causeline.service.errors import ConfigError
from causeline.service.spec.expressions import parse_expression
from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator, model_validator

NAME_PATTERN = r"^[A-Za-z_][A-Za-z0-9_]*$"
CODE_PATTERN = r"^[A-Z][A-Z0-9_]*$"
PLACEHOLDER = re.compile(r"\{([A-Za-z_][A-Za-z0-9_]*)(?::(typical))?\}")

Role = Literal["controllable", "observable"]
Kind = Literal["numeric", "categorical"]
Direction = Literal["high", "low", "any"]


class Strict(BaseModel):
    """Base for spec models: unknown keys are errors, instances are immutable."""

    model_config = ConfigDict(extra="forbid", frozen=True)


class FeatureSpec(Strict):
    """One model input: a raw column, or an arithmetic expression over other columns."""

    name: str = Field(pattern=NAME_PATTERN)
    role: Role
    kind: Kind = "numeric"
    unit: str = ""
    description: str = ""
    column: str | None = None
    expr: str | None = None
    categories: tuple[str, ...] | None = None
    allow_missing: bool = True

    @model_validator(mode="after")
    def _check(self) -> FeatureSpec:
        if self.expr is not None:
            if self.column is not None:
                raise ValueError("give either column or expr, not both")
            if self.kind != "numeric":
                raise ValueError("a derived feature (expr) must be numeric")
            try:
                parse_expression(self.expr)
            except ConfigError as exc:
                raise ValueError(str(exc)) from None
        if self.categories is not None and self.kind != "categorical":
            raise ValueError("categories are only for kind: categorical")
        return self

    @property
    def derived(self) -> bool:
        return self.expr is not None

    @property
    def source_column(self) -> str:
        """The raw column a non-derived feature reads."""
        return self.column or self.name


class Fix(Strict):
    """The kind of fix a code suggests, and the settings it brings for controllable drivers."""

    kind: str = Field(min_length=1)
    action: str = Field(min_length=1)
    targets: dict[str, float | str] = Field(default_factory=dict)


class ReasonCode(Strict):
    """A stable code covering one or more features; their contributions are summed."""

    code: str = Field(pattern=CODE_PATTERN, max_length=64)
    features: tuple[str, ...] = Field(min_length=1)
    direction: Direction = "high"
    text: str = Field(min_length=1)
    fix: Fix | None = None

    @field_validator("text")
    @classmethod
    def _placeholders(cls, text: str) -> str:
        stripped = PLACEHOLDER.sub("", text)
        if "{" in stripped or "}" in stripped:
            raise ValueError("placeholders look like {feature} or {feature:typical}")
        return text

    def placeholders(self) -> list[str]:
        return [match.group(1) for match in PLACEHOLDER.finditer(self.text)]


class ExplainSettings(Strict):
    """How contributions become reasons."""

    # Four reasons: the useful maximum that US Regulation B's official commentary gives for
    # adverse-action notices (12 CFR part 1002, Supplement I, comment 9(b)(2)-1).
    top_k: int = Field(default=4, ge=1, le=20)
    # In log-odds: smaller contributions are noise, not reasons.
    min_contribution: float = Field(default=0.05, ge=0.0)


class DatasetSpec(Strict):
    """Columns of an event table and what each feature means."""

    name: str = Field(pattern=r"^[A-Za-z0-9_.-]+$")
    target: str
    id: str
    time: str | None = None
    entity: str | None = None
    features: tuple[FeatureSpec, ...] = Field(min_length=1)
    reason_codes: tuple[ReasonCode, ...] = ()
    timeline: TimelineSpec | None = None

    @model_validator(mode="after")
    def _cross_check(self) -> DatasetSpec:
        names = [feature.name for feature in self.features]
        seen: set[str] = set()
        for index, name in enumerate(names):
            if name in seen:
                raise ValueError(f"features[{index}].name: {name!r} is used twice")
            seen.add(name)
        raw = {f.name for f in self.features if not f.derived}
        for index, feature in enumerate(self.features):
            if feature.derived:
                for used in sorted(parse_expression(feature.expr or "").names):
                    if used in seen and used not in raw:
                        raise ValueError(
                            f"features[{index}].expr: {used!r} is derived; "
                            "expressions read raw columns and raw features only"
                        )
        self._check_codes(set(names))
        return self

    def _check_codes(self, names: set[str]) -> None:
        by_feature_set: dict[tuple[str, ...], list[ReasonCode]] = {}
        owner: dict[str, tuple[str, ...]] = {}
        codes: set[str] = set()
        features = {f.name: f for f in self.features}
        for index, code in enumerate(self.reason_codes):
            where = f"reason_codes[{index}]"
            if code.code in codes:
                raise ValueError(f"{where}.code: {code.code!r} is used twice")
            codes.add(code.code)
            for name in code.features:
                if name not in names:
                    raise ValueError(f"{where}.features: {name!r} is not a feature")
                if name in owner and owner[name] != code.features:
                    raise ValueError(
                        f"{where}.features: {name!r} is already covered by a code with "
                        f"features {list(owner[name])}; codes sharing a feature must cover "
                        "the same features"
                    )
                owner[name] = code.features
            for name in code.placeholders():
                if name not in names:
                    raise ValueError(f"{where}.text: {{{name}}} is not a feature")
            primary = features[code.features[0]]
            if code.direction != "any" and primary.kind == "categorical":
                raise ValueError(f"{where}.direction: a categorical feature takes 'any'")
            group = by_feature_set.setdefault(code.features, [])
            directions = [c.direction for c in group] + [code.direction]
            repeated = len(set(directions)) < len(directions)
            if ("any" in directions and len(directions) > 1) or repeated:
                raise ValueError(
                    f"{where}.direction: codes over the same features need distinct "
                    "directions 'high' and 'low' ('any' stands alone)"
                )
            group.append(code)
            if code.fix is not None:
                for target, value in code.fix.targets.items():
                    if target not in features:
                        raise ValueError(f"{where}.fix.targets: {target!r} is not a feature")
                    spec = features[target]
                    if spec.role != "controllable":
                        raise ValueError(
                            f"{where}.fix.targets: {target!r} is observable; only "
                            "controllable features take a target setting"
                        )
                    if spec.kind == "numeric" and not isinstance(value, int | float):
                        raise ValueError(f"{where}.fix.targets: {target!r} needs a number")
                    if spec.kind == "categorical" and not isinstance(value, str):
                        raise ValueError(f"{where}.fix.targets: {target!r} needs a category")

    @property
    def feature_names(self) -> list[str]:
        return [feature.name for feature in self.features]

    def feature(self, name: str) -> FeatureSpec:
        for feature in self.features:
            if feature.name == name:
                return feature
        raise KeyError(name)


M = TypeVar("M", bound=BaseModel)


def validate_model(model: type[M], data: Any, source: str) -> M:
    """Validate ``data`` as ``model`` or raise a one-line :class:`ConfigError` naming the key."""
    if not isinstance(data, Mapping):
        raise ConfigError(f"{source}: expected a mapping at the top level")
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        first = exc.errors()[0]
        location = _location(first.get("loc", ()))
        message = first.get("msg", "invalid").removeprefix("Value error, ")
        extra = f" (and {exc.error_count() - 1} more)" if exc.error_count() > 1 else ""
        if first.get("type") == "extra_forbidden":
            message = "unknown key"
        where = f" at {location}" if location else ""
        raise ConfigError(f"{source}{where}: {message}{extra}") from None


def _location(parts: tuple[Any, ...]) -> str:
    text = ""
    for part in parts:
        if isinstance(part, int):
            text += f"[{part}]"
        else:
            text += f".{part}" if text else str(part)
    return text


# Timelines: how raw logs become the snapshot table above (built by ``service.timeline``).

Aggregation = Literal["last", "mean", "min", "max", "std", "slope", "count_above"]
CalendarPart = Literal["month", "weekday", "hour"]
# A span on a time clock: a number and a unit, e.g. 30m, 24h, 7d, 2w.
DURATION = re.compile(r"^(\d+(?:\.\d+)?)([smhdw])$")
UNIT_SECONDS = {"s": 1, "m": 60, "h": 3600, "d": 86_400, "w": 604_800}


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
    """Static attributes, one row per entity, joined onto every snapshot."""

    entity: str
    columns: tuple[str, ...] = Field(min_length=1)


class SnapshotCadence(Strict):
    """``every: reading``, or a period (``1d``, or cycles on a cycle clock), maybe ``at: HH:MM``."""

    every: str | float = "reading"
    at: str | None = Field(default=None, pattern=r"^([01]\d|2[0-3]):[0-5]\d$")


class LookbackWindow(Strict):
    """A window ending at the snapshot: a span ``(t - span, t]`` or the last N readings."""

    span: str | float | None = None
    readings: int | None = Field(default=None, ge=1)
    aggregations: tuple[Aggregation, ...] = Field(min_length=1)
    measurements: tuple[str, ...] | None = None
    # count_above counts readings strictly above the measurement's limit.
    limits: dict[str, float] = Field(default_factory=dict)

    @model_validator(mode="after")
    def _one(self) -> LookbackWindow:
        if (self.span is None) == (self.readings is None):
            raise ValueError("give exactly one of span or readings")
        if ("count_above" in self.aggregations) != bool(self.limits):
            raise ValueError("count_above and limits go together")
        return self


class DownRule(Strict):
    """When an entity counts as failed or under repair, so its snapshots are excluded.

    Down from a failure at f through ``f + after_failure`` (inclusive: a snapshot at the failure
    itself is always excluded), and, when ``until_action`` names action kinds, until the first
    such action at or after f (snapshots strictly after that action count again).
    """

    after_failure: str | float = 0.0
    until_action: tuple[str, ...] = ()


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
        kinds = set(self.actions.kinds) if self.actions else set()
        for kind in self.down.until_action:
            if kind not in kinds:
                raise ValueError(f"down.until_action: {kind!r} is not one of actions.kinds")
        names = self.feature_names
        for name in names:
            if not re.match(NAME_PATTERN, name):
                raise ValueError(f"feature name {name!r} is not a valid name; rename the column")
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
                    if aggregation == "count_above" and measurement not in window.limits:
                        continue
                    out.append((f"{measurement}__{aggregation}_{tag}", index, measurement,
                                aggregation))
        return out

    def action_feature(self, kind: str) -> str:
        slug = re.sub(r"[^a-z0-9]+", "_", kind.lower()).strip("_")
        return f"since_{slug}_{self.time_suffix}"

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


# DatasetSpec names TimelineSpec before it is defined.
DatasetSpec.model_rebuild()
