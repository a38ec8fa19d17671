"""Request and response bodies of the HTTP API (they also make the OpenAPI document)."""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, ConfigDict, Field

Value = float | str | None


class ScoreRequest(BaseModel):
    """Events to score: raw fields as in the training table, one object per event."""

    model_config = ConfigDict(extra="forbid")

    model: str | None = Field(
        default=None, description="bundle name; omit to use the default model"
    )
    events: list[dict[str, Any]] = Field(
        min_length=1,
        description="each event maps field name to a number, a string (categories, id) or null; "
        "the fields of each served model are in this document's Event-* schemas and at "
        "GET /v1/models/{name}",
    )


class TimelineScoreRequest(BaseModel):
    """One entity's raw logs; the service builds its latest snapshot as ``causeline build`` does."""

    model_config = ConfigDict(extra="forbid")

    model: str | None = Field(
        default=None, description="bundle name; omit to use the default model"
    )
    readings: list[dict[str, Any]] = Field(
        min_length=1, description="the entity's readings covering the look-back windows"
    )
    failures: list[dict[str, Any]] = Field(default_factory=list, description="earlier failures")
    actions: list[dict[str, Any]] = Field(
        default_factory=list, description="earlier maintenance actions"
    )
    attributes: dict[str, Any] | None = Field(
        default=None, description="the entity's static attributes"
    )
    # Checked by the online builder, which knows the clock (text on a time clock, a number on
    # a cycle clock): declared as a union here, pydantic would name its members in errors.
    at: Any = Field(
        default=None,
        description="snapshot time (ISO time, or a cycle number); default: the latest reading",
        json_schema_extra={"anyOf": [{"type": "string"}, {"type": "number"}, {"type": "null"}]},
    )


class ModelRef(BaseModel):
    name: str
    version: str


class ReasonOut(BaseModel):
    code: str
    text: str
    contribution: float = Field(description="the code's contribution in log-odds")
    values: dict[str, Value] = Field(description="the event's values of the code's features")


class ChangeOut(BaseModel):
    feature: str
    from_: float | str | None = Field(alias="from", description="the value now (null: missing)")
    to: float | str


class ActionOut(BaseModel):
    """A model estimate for qualified staff to review, never an instruction: stay within the
    equipment maker's limits and local codes; exclude unsafe settings in the config."""

    changes: list[ChangeOut] = Field(
        description="empty when no allowed change lowers the probability")
    cost: float
    probability_before: float
    probability_after: float
    reaches_threshold: bool
    reason_codes_after: list[str]
    moved_with: list[ChangeOut] = Field(
        default_factory=list, description="observable features that share a reason code with a "
        "changed one, moved with it along the training data's least-squares line (an "
        "association, not a physical law)")


class EventResult(BaseModel):
    id: str
    probability: float = Field(description="calibrated probability of the event")
    decision: bool = Field(description="probability at or above the threshold")
    threshold: float
    reasons: list[ReasonOut]
    warnings: list[str] = Field(description="e.g. values outside the training range")
    base_value: float | None = Field(
        default=None, description="with ?contributions=all: the SHAP base value (log-odds)"
    )
    contributions: dict[str, float] | None = Field(
        default=None, description="with ?contributions=all: every feature's SHAP value"
    )
    what_to_change: ActionOut | None = Field(
        default=None, description="with ?what-to-change[=N]: the cheapest allowed change of at "
        "most N controllable features (default 2) that brings the event below the threshold; "
        "null for an event already below it. A model estimate for qualified staff to review, "
        "never an instruction; respect the equipment maker's limits and local codes",
    )


class ScoreResponse(BaseModel):
    model: ModelRef
    results: list[EventResult]
    ignored_fields: list[str] = Field(
        default_factory=list,
        description="fields the events carried that the model does not use, left out of "
        "scoring (setting CAUSELINE_UNKNOWN_FIELDS=reject refuses them instead)",
    )


class ModelSummary(BaseModel):
    name: str
    version: str
    created: str
    default: bool


class ModelList(BaseModel):
    default: str | None
    models: list[ModelSummary]


class FeatureOut(BaseModel):
    name: str
    field: str | None = Field(description="the event field it reads; null for derived features")
    expr: str | None = None
    kind: str
    role: str
    unit: str
    description: str
    allow_missing: bool
    categories: list[str] | None = None
    training_minimum: float | None = None
    training_maximum: float | None = None
    typical: float | str | None = None


class FixOut(BaseModel):
    kind: str
    action: str
    targets: dict[str, float | str]


class CodeOut(BaseModel):
    code: str
    features: list[str]
    direction: str
    text: str
    fix: FixOut | None = None


class FieldsOut(BaseModel):
    required: list[str]
    optional: list[str]


class ModelDescription(BaseModel):
    name: str
    version: str
    created: str
    threshold: float
    decision_rule: str
    fields: FieldsOut
    features: list[FeatureOut]
    catalogue: list[CodeOut]
    metrics: dict[str, Any]
    caution: str = Field(
        default="", description="The data set's own caution, beside the general one: scores "
        "are model estimates for qualified staff to review; local codes and licensed practice "
        "come first where safety is involved.")


class Liveness(BaseModel):
    status: str


class LogStatus(BaseModel):
    status: str = Field(description="ok, failing or off")
    folder: str | None = None
    error: str | None = None
    written: int = 0
    dropped: int = 0


class ReloadOut(BaseModel):
    ok: bool
    attempted_at: str | None
    error: str | None
    failures: int


class Readiness(BaseModel):
    status: str = Field(description="ready or not ready")
    models: list[ModelRef]
    default: str | None
    loaded_at: str | None
    last_reload: ReloadOut
    prediction_log: LogStatus


class ReloadResult(BaseModel):
    models: list[ModelRef]
    previous: list[ModelRef]
