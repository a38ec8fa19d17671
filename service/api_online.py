"""One entity's raw logs to the event ``/v1/score`` takes, built by the batch build's own code.

``service.timeline.entity_features`` is the function ``causeline build`` runs over whole logs, so
a snapshot scored online has exactly the features the model was trained on.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from service.api_models import TimelineScoreRequest
from service.bundle import Bundle
from service.errors import CauselineError, first_line
from service.problems import FieldError, Problem
from service.timeline import TimelineInputs, entity_features


def online_event(bundle: Bundle, payload: TimelineScoreRequest) -> dict[str, Any]:
    """The built snapshot as an event of raw fields; 422 problems for what cannot be built."""
    spec = bundle.spec
    if spec.timeline is None:
        raise Problem(
            422, f"model {bundle.name!r} is not built from timelines; send built features to "
            "/v1/score", "no-timeline",
            [FieldError(field="readings", message="this model takes built features")],
        )
    inputs = TimelineInputs(
        readings=pd.DataFrame(payload.readings),
        failures=pd.DataFrame(payload.failures) if payload.failures else _empty(spec, "failures"),
        actions=pd.DataFrame(payload.actions) if payload.actions else _empty(spec, "actions"),
        attributes=pd.DataFrame([payload.attributes]) if payload.attributes else None,
    )
    try:
        row = entity_features(spec, inputs, at=payload.at)
    except (CauselineError, KeyError, ValueError, TypeError) as exc:
        message = first_line(exc)
        raise Problem(
            422, f"the logs cannot be built into a snapshot: {message}", "invalid-timeline",
            [FieldError(field="readings", message=message)],
        ) from None
    if len(row) != 1:
        raise Problem(422, "the logs give no snapshot", "invalid-timeline",
                      [FieldError(field="readings", message="no snapshot could be built")])
    # The build makes every windowed feature; the model reads the ones its config lists.
    wanted = set(bundle.builder.required_columns) | {spec.id, spec.time, spec.entity}
    return {name: _plain(value) for name, value in row.iloc[0].items() if name in wanted}


def _empty(spec: Any, log: str) -> pd.DataFrame | None:
    """An empty log with the configured columns, where the config expects one."""
    section = getattr(spec.timeline, log)
    if section is None:
        return None
    columns = [c for c in (getattr(section, "entity", None), getattr(section, "time", None),
                           getattr(section, "type_column", None),
                           getattr(section, "kind_column", None)) if c]
    return pd.DataFrame({column: pd.Series(dtype=object) for column in columns})


def _plain(value: Any) -> Any:
    """NumPy and pandas scalars as JSON values; missing as None."""
    if value is None or (isinstance(value, float) and np.isnan(value)) or value is pd.NaT:
        return None
    if isinstance(value, np.generic):
        value = value.item()
        if isinstance(value, float) and np.isnan(value):
            return None
    if isinstance(value, pd.Timestamp):
        return value.isoformat()
    return value
