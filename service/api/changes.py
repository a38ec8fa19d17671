"""What to change, per scored event, for the ``what-to-change`` query flag of the scoring routes.

The same search as ``causeline explain --what-to-change`` (:mod:`causeline.service.actions`):
the events are built into model-ready rows again and each one at or above the threshold gets
its cheapest allowed change. A finder per model and number of changes is made once per loaded
set of bundles (it reads the model's split thresholds).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from causeline.service.actions.search import ActionFinder, Actions
from causeline.service.api.problems import FieldError, Problem
from causeline.service.api.registry import Model

FLAG = "what-to-change"
MOST = 4  # changes per action a request may ask for: the search grows with the power


def flag_value(raw: str | None) -> int | None:
    """The flag's value: absent None, empty 2 (the default), else a whole number 1..MOST."""
    if raw is None:
        return None
    if raw == "":
        return 2
    if raw.isdigit() and 1 <= int(raw) <= MOST:
        return int(raw)
    raise Problem(422, "1 invalid field(s) in the request", "invalid-request", [FieldError(
        field=FLAG, message=f"the most features to change, 1 to {MOST} (empty: 2)")])


def records(model: Model, events: Sequence[Mapping[str, Any]],
            max_changes: int, finders: dict[tuple[str, int], ActionFinder]
            ) -> list[dict[str, Any] | None]:
    """Per event its action record, None where it is below the threshold (runs in a thread:
    the search is CPU work)."""
    bundle = model.bundle
    if not any(f.change is not None for f in bundle.spec.features):
        raise Problem(422, f"model {model.name!r} allows no change: its config gives no "
                      "controllable feature a `change:` setting", "invalid-request",
                      [FieldError(field=FLAG, message="this model has no change settings")])
    key = (model.name, max_changes)
    if key not in finders:
        finders[key] = ActionFinder(bundle, max_changes)
    values = bundle.builder.transform_records(events).values
    finder = finders[key]
    found = Actions.of_rows(model.explainer, values, finder.probability(values), max_changes,
                            finder)
    return [_plain(r) for r in found.records()]


def _plain(record: dict[str, Any] | None) -> dict[str, Any] | None:
    """Numbers as Python floats (the JSON writer takes no numpy scalars)."""
    if record is None:
        return None
    for change in record["changes"] + record["moved_with"]:
        for side in ("from", "to"):
            if isinstance(change[side], np.floating):
                change[side] = float(change[side])
    return record
