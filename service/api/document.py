"""The OpenAPI document with each served model's event fields, rebuilt after every reload.

FastAPI describes ``POST /v1/score`` from its body model, where an event can only be a free-form
object: a client generated from that knows no field, and ``{"events": [{}]}`` looks valid. Here
each served model's :meth:`EventSchema.json_schema` joins the components as ``Event-<model>``
and the request's ``events`` items refer to them (one model: its schema; several: any of them,
the one named in ``model`` applies), and ``model`` lists the served names.
"""

from __future__ import annotations

import copy
import re
from typing import Any

from fastapi import FastAPI
from fastapi.openapi.utils import get_openapi

from causeline.service.api.state import Service

SCORE_PATH = "/v1/score"


def component_name(model: str) -> str:
    """A component key OpenAPI allows (letters, digits, '.', '-', '_')."""
    return "Event-" + re.sub(r"[^A-Za-z0-9._-]", "_", model)


def install(app: FastAPI, service: Service) -> None:
    """Serve the document with the current models' fields (built once per loaded set)."""
    cache: dict[str, Any] = {}

    def document() -> dict[str, Any]:
        current = service.current
        if cache.get("for") is current and "document" in cache:
            return cache["document"]
        base = copy.deepcopy(get_openapi(
            title=app.title, version=app.version, openapi_version=app.openapi_version,
            summary=app.summary, description=app.description, routes=app.routes,
        ))  # a copy: the routes' own declarations must stay as they are
        if current is not None:
            _add_events(base, current, service.settings.max_events)
        cache.update({"for": current, "document": base})
        return base

    app.openapi = document  # type: ignore[method-assign]


def _add_events(document: dict[str, Any], current: Any, max_events: int) -> None:
    schemas = document.setdefault("components", {}).setdefault("schemas", {})
    refs = []
    for name, schema in current.schemas.items():
        key = component_name(name)
        schemas[key] = schema.json_schema()
        refs.append({"$ref": f"#/components/schemas/{key}"})
    body = document["paths"][SCORE_PATH]["post"]["requestBody"]["content"]["application/json"]
    properties = body["schema"]["properties"]
    events = properties["events"]
    events["items"] = refs[0] if len(refs) == 1 else {"anyOf": refs}
    events["maxItems"] = max_events
    default = current.served.default
    properties["model"] = {
        "anyOf": [{"type": "string", "enum": list(current.schemas)}, {"type": "null"}],
        "default": None,
        "description": f"bundle name; omit for the default model ({default})",
    }
