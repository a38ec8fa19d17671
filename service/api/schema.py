"""The fields an event may carry for one bundle, and the JSON-level checks made before scoring.

Checks that need the bundle's categories or missing-value rules come from
:class:`~causeline.service.features.builder.FeatureMatrix` problems after the features are built;
both kinds end up as :class:`~causeline.service.api.problems.FieldError` naming the event and the
field.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from causeline.service.api.problems import FieldError
from causeline.service.bundle.load import Bundle
from causeline.service.errors import RowProblem
from causeline.service.files.tables import LARGEST

_ABSENT = object()
MAX_TEXT = 256  # ids, times and entities; and field names echoed in errors


class EventSchema:
    """Required and optional fields of an event, with the JSON type each takes."""

    def __init__(self, bundle: Bundle, reject_unknown: bool = True) -> None:
        spec = bundle.spec
        self.id_field = spec.id
        self.required = list(bundle.builder.required_columns)
        categorical = {f.source_column for f in spec.features if f.kind == "categorical"}
        self.text = {name for name in self.required if name in categorical}
        self.optional = [name for name in (spec.id, spec.time, spec.entity) if name]
        self.known = set(self.required) | set(self.optional)
        self.reject_unknown = reject_unknown
        # Feature problems name features; clients know fields (raw columns).
        self._field_of = {
            f.name: f.source_column for f in spec.features if not f.derived
        }
        self._derived = {f.name: f.expr for f in spec.features if f.derived}

    def check(self, events: Sequence[Mapping[str, Any]]) -> list[FieldError]:
        """Unknown and missing fields, wrong JSON types, NaN and Infinity tokens."""
        errors: list[FieldError] = []
        for index, event in enumerate(events):
            if self.reject_unknown and not self.known.issuperset(event):
                errors += [
                    FieldError(event=index, field=str(name)[:MAX_TEXT], message="unknown field")
                    for name in event if name not in self.known
                ]
            for name in self.required:
                value = event.get(name, _ABSENT)
                # The common cases first, cheaply: null, a finite number where a number
                # belongs (NaN, infinity and huge integers fail the comparison), text where
                # text belongs.
                kind = type(value)
                if value is None or (
                    (kind is str) if name in self.text
                    else ((kind is int or kind is float) and -LARGEST <= value <= LARGEST)
                ):
                    continue
                if value is _ABSENT:
                    message = "field is required (send null for an unknown value)"
                    errors.append(FieldError(event=index, field=name, message=message))
                    continue
                message = self._type_error(name, value)
                if message:
                    errors.append(FieldError(event=index, field=name, message=message))
            for name in self.optional:
                value = event.get(name)
                if value is None:
                    continue
                if isinstance(value, bool) or not isinstance(value, str | int):
                    errors.append(
                        FieldError(event=index, field=name, message="expected a string")
                    )
                elif len(str(value)) > MAX_TEXT:
                    # Ids are logged, grouped and written to CSVs that spreadsheets open.
                    message = f"longer than {MAX_TEXT} characters"
                    errors.append(FieldError(event=index, field=name, message=message))
        return errors

    def _type_error(self, name: str, value: Any) -> str | None:
        if value is None:
            return None
        if name in self.text:
            if isinstance(value, str) or (isinstance(value, int) and not isinstance(value, bool)):
                return None
            return f"expected a string (a category), got {json_type(value)}"
        return number_error(value)

    def frame(
        self, events: Sequence[Mapping[str, Any]], ids: Sequence[str]
    ) -> dict[str, np.ndarray]:
        """The checked events as columns the feature builder reads (ids always present).

        Plain arrays rather than a DataFrame: building one costs more than explaining an event.
        """
        columns: dict[str, np.ndarray] = {}
        for name in self.required:
            values = [event[name] for event in events]
            if name in self.text:
                columns[name] = np.array(
                    [None if v is None else str(v) for v in values], dtype=object
                )
            else:
                columns[name] = np.array(values, dtype=np.float64)  # None becomes NaN
        columns[self.id_field] = np.array(list(ids), dtype=object)
        return columns

    def problem_errors(self, problems: Sequence[RowProblem], offset: int = 0) -> list[FieldError]:
        """Feature-builder problems (unknown category, missing, ...) as field errors."""
        out = []
        for problem in problems:
            field = self._field_of.get(problem.column, problem.column)
            message = problem.message
            if problem.column in self._derived:
                message = f"{message} (derived feature: {self._derived[problem.column]})"
            out.append(FieldError(event=problem.row - offset, field=field, message=message))
        return out


def event_id(event: Mapping[str, Any], id_field: str, position: int) -> str:
    """The event's id as text, or its position in the request when it has none."""
    value = event.get(id_field)
    return str(position) if value is None else str(value)


def number_error(value: Any) -> str | None:
    """Why a JSON value cannot be a number field's value; None for null or a usable number."""
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int | float):
        return f"expected a number, got {json_type(value)}"
    if isinstance(value, float) and math.isnan(value):
        return "NaN is not a JSON number; send null for an unknown value"
    if isinstance(value, float) and math.isinf(value):
        return "Infinity (or a number too large for a float64) cannot be scored; send a " \
            "finite number"
    if not -LARGEST <= value <= LARGEST:
        return f"the number is out of range (at most {LARGEST:.4g} in size)"
    return None


def json_type(value: Any) -> str:
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, list):
        return "an array"
    if isinstance(value, dict):
        return "an object"
    return "a number"
