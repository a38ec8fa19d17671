"""What a data set means: its columns, features and reason-code catalogue.

The same models describe a data-set config (YAML, read by ``training``) and the spec stored in a
bundle's manifest (JSON, read here), so the two cannot drift apart. Validation errors name the
exact key, e.g. ``reason_codes[2].fix.targets: 'door_openings_per_h' is observable``.
"""

from __future__ import annotations

import difflib
import re
from typing import Literal

from pydantic import Field, field_validator, model_validator

from causeline.service.errors import ConfigError
from causeline.service.spec.base import NAME_PATTERN, Strict
from causeline.service.spec.expressions import parse_expression
from causeline.service.spec.timeline import TimelineSpec

CODE_PATTERN = r"^[A-Z][A-Z0-9_]*$"
PLACEHOLDER = re.compile(r"\{([A-Za-z_][A-Za-z0-9_]*)(?::(typical))?\}")
# controllable: a team can change it (a setting, a maintenance interval); observable: a
# condition that can be measured, not set; context: when, or what came before (calendar,
# earlier failures, time since the last one). Context explains a score but is no cause: root
# causes are grouped without it, and it takes no fix target.
Role = Literal["controllable", "observable", "context"]
Kind = Literal["numeric", "categorical"]
Direction = Literal["high", "low", "any"]


class ChangeSpec(Strict):
    """How a controllable feature may be changed when causeline proposes what to change.

    Numeric: within ``[min, max]``, only in ``direction`` (``decrease``: days since a cleaning
    can only be reset downwards), in multiples of ``step`` from the current value when given.
    Categorical: to one of ``values``. A change costs ``cost`` plus ``cost_per_unit`` times how
    far it moves. A controllable feature without a ``change`` is never moved.
    """

    min: float | None = None
    max: float | None = None
    direction: Literal["decrease", "increase", "both"] = "both"
    step: float | None = Field(default=None, gt=0)
    values: tuple[str, ...] | None = None
    cost: float = Field(default=1.0, ge=0)
    cost_per_unit: float = Field(default=0.0, ge=0)

    @model_validator(mode="after")
    def _check(self) -> ChangeSpec:
        if self.min is not None and self.max is not None and self.min > self.max:
            raise ValueError("min is above max")
        return self


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
    # What a missing value means when it is a state, not a gap (say, "no alarm logged"):
    # reasons show these words and scoring raises no missing-value warning for it.
    missing_means: str = ""
    change: ChangeSpec | None = None

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
        change = self.change
        if change is not None:
            if self.role != "controllable":
                raise ValueError(f"change: only a controllable feature changes; this one is "
                                 f"{self.role}")
            if self.derived:
                raise ValueError("change: a derived feature (expr) changes through the "
                                 "features it reads")
            if self.kind == "categorical":
                numeric = [k for k in ("min", "max", "step", "cost_per_unit")
                           if getattr(change, k) not in (None, 0.0)]
                if numeric or change.direction != "both":
                    raise ValueError("change: a categorical feature takes values (and cost), "
                                     f"not {(numeric or ['direction'])[0]}")
                if not change.values:
                    raise ValueError("change.values: list the categories it may be set to")
                if self.categories is not None:
                    unknown = [v for v in change.values if v not in self.categories]
                    if unknown:
                        raise ValueError(f"change.values: {unknown[0]!r} is not one of its "
                                         "categories")
            elif change.values is not None:
                raise ValueError("change.values: only for a categorical feature")
        return self

    @property
    def derived(self) -> bool:
        return self.expr is not None

    @property
    def source_column(self) -> str:
        """The raw column a non-derived feature reads."""
        return self.column or self.name


class Fix(Strict):
    """The kind of fix a code suggests, and the settings it brings for controllable drivers.

    ``actions``: the kinds of the timeline's maintenance log (``timeline.actions.kinds``) that
    carry this fix out, for ``causeline effect``; without them a kind belongs to a fix whose
    targets set its time-since feature, or whose kind reads the same (``firmware update`` and
    ``firmware_update``).
    """

    kind: str = Field(min_length=1)
    action: str = Field(min_length=1)
    targets: dict[str, float | str] = Field(default_factory=dict)
    actions: tuple[str, ...] = ()


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
    # The domain's own caution, shown with every model card, report and API description after
    # the general one (say, food safety for refrigerated cases).
    caution: str = ""

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
        for index, feature in enumerate(self.features):
            if feature.derived:
                read = parse_expression(feature.expr or "").names
                for other in self.features:
                    if other.change is not None and other.name in read:
                        raise ValueError(
                            f"features[{index}].expr: reads {other.name!r}, which has a "
                            "change; proposed changes move only features the model reads "
                            "directly, so remove one of the two")
        if self.timeline is not None:
            self._check_built(raw)
        self._check_codes(set(names))
        self._check_fix_actions()
        return self

    def _check_built(self, raw: set[str]) -> None:
        """With a timeline section, every raw feature must be a column the build makes."""
        assert self.timeline is not None
        built = self.timeline.feature_names
        kinds = self.timeline.actions.kinds if self.timeline.actions else ()
        from_kind = {self.timeline.action_feature(kind): kind for kind in kinds}
        for index, feature in enumerate(self.features):
            used = ([feature.source_column] if not feature.derived
                    else sorted(parse_expression(feature.expr or "").names - raw))
            for column in used:
                if column in built:
                    continue
                close = difflib.get_close_matches(column, built, n=1, cutoff=0.6)
                hint = f" (did you mean {close[0]!r}?)" if close else ""
                if close and close[0] in from_kind:
                    # The feature may be right and the action kind misspelt: say both.
                    hint = (f" (the timeline builds {close[0]!r} from actions.kinds "
                            f"{from_kind[close[0]]!r}: fix whichever is misspelt)")
                raise ValueError(
                    f"features[{index}]: {column!r} is not a column the timeline section "
                    f"builds{hint}; `causeline build --config <this file> --list-features` "
                    "prints them"
                )

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
                            f"{where}.fix.targets: {target!r} is {spec.role}; only "
                            "controllable features take a target setting"
                        )
                    if spec.kind == "numeric" and not isinstance(value, int | float):
                        raise ValueError(f"{where}.fix.targets: {target!r} needs a number")
                    if spec.kind == "categorical" and not isinstance(value, str):
                        raise ValueError(f"{where}.fix.targets: {target!r} needs a category")

    def _check_fix_actions(self) -> None:
        kinds = self.timeline.actions.kinds if self.timeline and self.timeline.actions else ()
        for index, code in enumerate(self.reason_codes):
            for kind in code.fix.actions if code.fix else ():
                if kind not in kinds:
                    raise ValueError(
                        f"reason_codes[{index}].fix.actions: {kind!r} is not one of "
                        f"timeline.actions.kinds ({', '.join(kinds) or 'none'})")

    @property
    def feature_names(self) -> list[str]:
        return [feature.name for feature in self.features]

    @property
    def missing_meanings(self) -> dict[str, str]:
        """Per feature whose missing value is a state, the words for it: the config's
        ``missing_means``, else the timeline's (time since a failure or action never logged)."""
        built = self.timeline.missing_meanings if self.timeline is not None else {}
        out = {}
        for feature in self.features:
            meaning = feature.missing_means or (
                "" if feature.derived else built.get(feature.source_column, ""))
            if meaning:
                out[feature.name] = meaning
        return out

    def feature(self, name: str) -> FeatureSpec:
        for feature in self.features:
            if feature.name == name:
                return feature
        raise KeyError(name)
