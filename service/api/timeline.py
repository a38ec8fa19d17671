"""One entity's raw logs to the event ``/v1/score`` takes, built by the batch build's own code.

:func:`causeline.service.features.snapshots.entity_features` runs the code ``causeline build``
runs over whole logs, so a snapshot scored online has exactly the features the model was trained
on.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from causeline.service.api.bodies import TimelineScoreRequest
from causeline.service.api.problems import FieldError, Problem
from causeline.service.api.schema import json_type, number_error, unknown_fields
from causeline.service.bundle.load import Bundle
from causeline.service.errors import CauselineError, first_line, quoted
from causeline.service.features.logs import LogValueError, TimelineInputs
from causeline.service.features.snapshots import DOWN_RULE, entity_features
from causeline.service.spec.timeline import TimelineSpec


def online_event(
    bundle: Bundle, payload: TimelineScoreRequest, reject_unknown: bool = True
) -> dict[str, Any]:
    """The built snapshot as an event of raw fields; 422 problems for what cannot be built.

    ``reject_unknown`` refuses readings fields the config does not name, as ``/v1/score``
    refuses unknown event fields (the ``unknown_fields`` setting).
    """
    spec = bundle.spec
    if spec.timeline is None:
        raise Problem(
            422, f"model {bundle.name!r} is not built from timelines; send built features to "
            "/v1/score", "no-timeline",
            [FieldError(field="readings", message="this model takes built features")],
        )
    errors = check_request(spec.timeline, payload, reject_unknown)
    if errors:
        raise Problem(422, f"{len(errors)} invalid field(s) in the request", "invalid-request",
                      errors)
    inputs = TimelineInputs(
        readings=pd.DataFrame(payload.readings),
        failures=pd.DataFrame(payload.failures) if payload.failures else _empty(spec, "failures"),
        actions=pd.DataFrame(payload.actions) if payload.actions else _empty(spec, "actions"),
        attributes=pd.DataFrame([payload.attributes]) if payload.attributes else None,
    )
    try:
        row = entity_features(spec, inputs, at=payload.at)
    except LogValueError as exc:
        field = _field(exc)
        raise Problem(
            422, f"the logs cannot be built into a snapshot: {field}: {exc.reason}",
            "invalid-timeline", [FieldError(field=field, message=exc.reason)],
        ) from None
    except (CauselineError, KeyError, ValueError, TypeError) as exc:
        message = first_line(exc)
        raise Problem(
            422, f"the logs cannot be built into a snapshot: {message}", "invalid-timeline",
            [FieldError(field="readings", message=message)],
        ) from None
    if len(row) != 1:
        raise Problem(422, "the logs give no snapshot", "invalid-timeline",
                      [FieldError(field="readings", message="no snapshot could be built")])
    rule = str(row[DOWN_RULE].iloc[0])
    if rule:
        # An entity that is down (a failure it has not come back from) cannot fail: a score
        # would be a number about nothing, so it is refused, saying which down rule holds.
        when = row[spec.time or spec.timeline.readings.time].iloc[0]
        raise Problem(
            409, f"the entity is down at {_plain(when)} ({rule}): a down entity is not scored",
            "entity-down", [FieldError(field="failures", message=f"down: {rule}")],
        )
    # The build makes every windowed feature; the model reads the ones its config lists.
    wanted = set(bundle.builder.required_columns) | {spec.id, spec.time, spec.entity}
    return {name: _plain(value) for name, value in row.iloc[0].items() if name in wanted}


def check_request(
    spec: TimelineSpec, payload: TimelineScoreRequest, reject_unknown: bool = True
) -> list[FieldError]:
    """The JSON types of ``at`` and of each reading, checked as ``/v1/score`` checks events.

    Values of the right type that still cannot be read (a time pandas cannot hold, a time
    before every reading) are the build's to refuse: it refuses them in batch builds too.
    """
    cycles = spec.clock == "cycle"
    errors: list[FieldError] = []
    if payload.at is not None and (message := _time_error(payload.at, cycles)):
        errors.append(FieldError(field="at", message=message))
    r = spec.readings
    known = {r.entity, r.time, *r.measurements, *r.states}
    first: tuple[int, str] | None = None
    second = False
    for row, reading in enumerate(payload.readings):
        found: list[tuple[str, str | None]] = []
        if not known.issuperset(reading):
            found += unknown_fields(reading, known, reject_unknown)
        entity = reading.get(r.entity)
        if entity is not None and (isinstance(entity, bool) or not isinstance(entity, str | int)):
            found.append((r.entity, "expected a string"))
        elif entity is not None and first is None:
            first = (row, str(entity))
        elif entity is not None and first is not None and str(entity) != first[1] and not second:
            second = True  # once: every later row of that entity would say the same
            found.append((r.entity, f"a second entity ({quoted(str(entity))}; readings."
                                    f"{first[0]} has {quoted(first[1])}): send the readings of "
                                    "one entity"))
        if reading.get(r.time) is not None:
            found.append((r.time, _time_error(reading[r.time], cycles)))
        found += [(name, number_error(reading.get(name))) for name in r.measurements]
        found += [(name, "expected a string or a number, got " + json_type(reading[name]))
                  for name in r.states if isinstance(reading.get(name), list | dict)]
        errors += [FieldError(field=f"readings.{row}.{name}", message=message)
                   for name, message in found if message]
    a = spec.attributes
    if a is not None and payload.attributes and first is not None:
        # The join is by entity: another entity's attributes would leave these ones missing.
        theirs = payload.attributes.get(a.entity)
        if theirs is not None and str(theirs) != first[1]:
            errors.append(FieldError(
                field=f"attributes.{a.entity}",
                message=f"{quoted(str(theirs))} is not the readings' entity {quoted(first[1])}"))
    return errors


def _time_error(value: Any, cycles: bool) -> str | None:
    """What is wrong with a JSON value given as a time, at the level of its JSON type."""
    if isinstance(value, str):
        return None  # the build parses it, in the same way as in a batch build
    if cycles:
        return number_error(value)
    # pandas would read a number as nanoseconds since 1970: no JSON number is a calendar time.
    return f"expected a time as ISO 8601 text, got {json_type(value)}"


def _field(error: LogValueError) -> str:
    """The request field a located build error points at: ``at`` or ``readings.3.time``."""
    if error.log == "at":
        return "at"
    parts = [error.log, error.row, error.column]
    return ".".join(str(part) for part in parts if part is not None)


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
