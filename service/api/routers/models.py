"""``GET /v1/models`` and ``GET /v1/models/{name}``: what is served, and each model's fields,
features, reason-code catalogue, threshold and held-out metrics."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Request

from causeline.service.api import problems
from causeline.service.api.bodies import (
    CodeOut,
    FeatureOut,
    FieldsOut,
    FixOut,
    ModelDescription,
    ModelList,
    ModelSummary,
)
from causeline.service.api.dependencies import require_key, service_of
from causeline.service.api.problems import Problem
from causeline.service.api.registry import Model
from causeline.service.api.schema import EventSchema
from causeline.service.errors import quoted

router = APIRouter(tags=["models"], dependencies=[Depends(require_key)])


@router.get("/v1/models", response_model=ModelList, responses=problems.responses(401, 403))
def models(request: Request) -> ModelList:
    """The models served, by name and version."""
    current = service_of(request).current
    assert current is not None
    served = current.served
    return ModelList(default=served.default, models=[
        ModelSummary(name=m.name, version=m.version, created=m.bundle.manifest.created,
                     default=m.name == served.default)
        for m in served.models.values()
    ])


@router.get("/v1/models/{name}", response_model=ModelDescription,
            responses=problems.responses(401, 403, 404))
def model(request: Request, name: str) -> ModelDescription:
    """A model's fields, features, reason-code catalogue, threshold and held-out metrics."""
    current = service_of(request).current
    assert current is not None
    if name not in current.served.models:
        raise Problem(404, f"no model named {quoted(name)}", "unknown-model")
    return describe(current.served.models[name], current.schemas[name])


def describe(model: Model, schema: EventSchema) -> ModelDescription:
    """The model description served by ``GET /v1/models/{name}``."""
    manifest = model.bundle.manifest
    features = []
    for feature in manifest.dataset.features:
        stats = manifest.stats.get(feature.name)
        features.append(FeatureOut(
            name=feature.name,
            field=None if feature.derived else feature.source_column,
            expr=feature.expr, kind=feature.kind, role=feature.role, unit=feature.unit,
            description=feature.description, allow_missing=feature.allow_missing,
            categories=list(stats.categories) if stats and stats.categories else None,
            training_minimum=stats.minimum if stats else None,
            training_maximum=stats.maximum if stats else None,
            typical=stats.typical if stats else None,
        ))
    catalogue = [
        CodeOut(code=c.code, features=list(c.features), direction=c.direction, text=c.text,
                fix=None if c.fix is None else FixOut(
                    kind=c.fix.kind, action=c.fix.action, targets=dict(c.fix.targets)))
        for c in model.explainer.catalogue.codes
    ]
    return ModelDescription(
        name=model.name, version=model.version, created=manifest.created,
        threshold=manifest.decision.threshold, decision_rule=manifest.decision.rule,
        fields=FieldsOut(required=schema.required, optional=schema.optional),
        features=features, catalogue=catalogue, metrics=manifest.metrics,
        caution=manifest.dataset.caution,
    )
