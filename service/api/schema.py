"""The fields an event may carry for one bundle, and the JSON-level checks made before scoring.

Checks that need the bundle's categories or missing-value rules come from
:class:`~causeline.service.features.builder.FeatureMatrix` problems after the features are built;
both kinds end up as :class:`~causeline.service.api.problems.FieldError` naming the event and the
field.
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Mapping, Sequence
from typing import Any

from causeline.service.api.problems import FieldError
from causeline.service.bundle.load import Bundle
from causeline.service.errors import RowProblem
from causeline.service.files.tables import LARGEST

_ABSENT = object()
MAX_TEXT = 256  # ids, times and entities; and field names echoed in errors


class EventSchema:
    """Required and optional fields of an event, with the JSON type each takes.

    A field the bundle does not use is refused with ``reject_unknown``; otherwise it is left
    out of scoring and named in the answer (:meth:`ignored`), so callers can send whole records.
    Either way a field that looks like a misspelling of one the event lacks (same name but for
    case, or close by :mod:`difflib`'s ratio) is refused, so a typo is never silently dropped.
    """

    def __init__(self, bundle: Bundle, reject_unknown: bool = True) -> None:
        spec = bundle.spec
        self.bundle = bundle
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
            if not self.known.issuperset(event):
                errors += [FieldError(event=index, field=name, message=message) for name, message
                           in unknown_fields(event, self.known, self.reject_unknown)]
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

    def ignored(self, events: Sequence[Mapping[str, Any]]) -> list[str]:
        """Fields the events carry that the bundle does not use, each once, in order met."""
        found: dict[str, None] = {}
        for event in events:
            if not self.known.issuperset(event):
                found.update((str(name)[:MAX_TEXT], None) for name in event
                             if name not in self.known)
        return list(found)

    def json_schema(self) -> dict[str, Any]:
        """The event as JSON Schema: each field's type, categories, unit and training range,
        which fields are required, and whether others may come along."""
        spec = self.bundle.spec
        stats = self.bundle.manifest.stats
        readers: dict[str, list[Any]] = {}
        for feature in spec.features:
            if not feature.derived:
                readers.setdefault(feature.source_column, []).append(feature)
        properties: dict[str, Any] = {}
        for name in self.required:
            features = readers.get(name, [])
            nullable = all(f.allow_missing for f in features)
            if name in self.text:
                field: dict[str, Any] = {"type": ["string", "null"] if nullable else "string"}
                known = [c for f in features if (st := stats.get(f.name)) and st.categories
                         for c in st.categories]
                if known:
                    field["enum"] = [*dict.fromkeys(known), *([None] if nullable else [])]
            else:
                field = {"type": ["number", "null"] if nullable else "number",
                         "minimum": -LARGEST, "maximum": LARGEST}
            words = []
            for feature in features:
                unit = f" ({feature.unit})" if feature.unit else ""
                words.append(f"{feature.description or feature.name}{unit}")
                st = stats.get(feature.name)
                if st is not None and st.minimum is not None and st.maximum is not None:
                    words.append(f"training range {st.minimum:g} to {st.maximum:g}")
            if not features:
                words.append("read by a derived feature")
            if nullable:
                words.append("null for an unknown value")
            field["description"] = "; ".join(words)
            properties[name] = field
        for name in self.optional:
            role = {spec.id: "event id", spec.time: "event time",
                    spec.entity: "equipment or unit"}.get(name, name)
            # Whole numbers are taken too and read as text; the document keeps to text.
            properties[name] = {"type": ["string", "null"], "maxLength": MAX_TEXT,
                                "description": f"{role} (optional)"}
        return {
            "type": "object",
            "title": f"Event for {self.bundle.name}",
            "properties": properties,
            "required": list(self.required),
            "additionalProperties": not self.reject_unknown,
            "description": (
                "Fields the model reads; required ones may be null where they say so. "
                + ("Other fields are refused." if self.reject_unknown else
                   "Other fields are left out of scoring and named in `ignored_fields`, "
                   "unless one looks like a misspelling of a field the event lacks.")
            ),
        }

    def _type_error(self, name: str, value: Any) -> str | None:
        if value is None:
            return None
        if name in self.text:
            if isinstance(value, str) or (isinstance(value, int) and not isinstance(value, bool)):
                return None
            return f"expected a string (a category), got {json_type(value)}"
        return number_error(value)

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


def unknown_fields(record: Mapping[str, Any], known: set[str],
                   reject: bool) -> list[tuple[str, str]]:
    """(field, message) for the fields of ``record`` outside ``known``: all of them with
    ``reject``, else only those that look like a misspelling of a known field it lacks."""
    lacking = [name for name in known if name not in record]
    out = []
    for name in record:
        if name in known:
            continue
        near = misspelling(str(name), lacking)
        if near is not None or reject:
            hint = "" if near is None else f"; did you mean {near!r}?"
            out.append((str(name)[:MAX_TEXT], "unknown field" + hint))
    return out


def misspelling(name: str, candidates: Sequence[str]) -> str | None:
    """The field among ``candidates`` that ``name`` looks like a misspelling of, if any: the
    same but for case, or close by difflib's ratio (0.8, the cut-off its docs use as a rule)."""
    folded = {candidate.casefold(): candidate for candidate in candidates}
    if name.casefold() in folded:
        return folded[name.casefold()]
    close = difflib.get_close_matches(name.casefold(), list(folded), 1, 0.8)
    return folded[close[0]] if close else None


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
