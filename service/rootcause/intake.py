"""Which events the root-cause job groups: read the input, pick events, apply the time window.

The input is a table (CSV, JSON lines, Parquet) or the service's prediction log. By default the
job groups actual events (the bundle's label column says the event happened); with
``predicted`` it groups rows whose calibrated probability reaches the bundle's threshold. A
prediction log holds no labels, so it needs ``predicted``. A client that retries logs the same
event again; in a prediction log each event id counts once (:func:`latest_entries`).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from causeline.service.bundle.load import Bundle
from causeline.service.errors import DataError
from causeline.service.explain.score import probability
from causeline.service.features.logs import RawPaths, read_inputs
from causeline.service.features.snapshots import (
    FAILURE_COUNTED,
    build_snapshots,
    labelled_table,
)
from causeline.service.files.predlog import is_prediction_log, read_prediction_log
from causeline.service.files.rejects import (
    add_rejects,
    cell_reasons,
    empty_rejects,
    keep_mask,
    label_reasons,
    merge_reasons,
    read_lenient,
)
from causeline.service.files.tables import binary_column, to_numbers
from causeline.service.files.window import utc_times

LOG_TIME = "log_logged_at"
LOG_ID = "log_id"
# Training reads the same spellings (training/checks.py); service cannot import training.


@dataclass(frozen=True)
class EventInput:
    """The readable input rows, where ids and times come from, and the rows set aside.

    ``rows`` holds each table row's number in the source (its line in a CSV or JSON-lines file);
    ``rejects`` the rows that could not be read (:mod:`causeline.service.files.rejects`);
    ``repeats_dropped`` the earlier log entries of event ids logged more than once
    (:func:`latest_entries`).
    """

    table: pd.DataFrame
    id_column: str
    time_column: str | None
    from_log: bool
    rows: np.ndarray
    rejects: pd.DataFrame
    repeats_dropped: int = 0


def read_events(bundle: Bundle, path: Path) -> EventInput:
    """Read a table or a prediction-log folder; ids (and entities) are kept as text."""
    path = Path(path)
    spec = bundle.spec
    if is_prediction_log(path):
        bad: list[dict[str, object]] = []
        table = read_prediction_log(path, rejects=bad)
        # Events sent without their own id are known by the id the log gave them.
        id_column = spec.id if spec.id in table.columns else LOG_ID
        for column in (id_column, spec.entity):
            if column is not None and column in table.columns:
                table[column] = table[column].astype("string")
        rejects = pd.DataFrame(bad) if bad else empty_rejects(table.columns)
        # Only the event's own id says two entries are one event: the id the log gives an event
        # sent without one is its position in the request, shared by unrelated events.
        latest = latest_entries(table, spec.id)
        rows = np.arange(1, len(table) + 1)[latest]
        table = table[latest].reset_index(drop=True)
        repeats = int((~latest).sum())
        return EventInput(table, id_column, LOG_TIME, True, rows, rejects, repeats)
    if path.is_dir():
        raise DataError(f"{path}: a folder without prediction-log segments")
    text = [c for c in (spec.id, spec.entity) if c is not None]
    read = read_lenient(path, text_columns=text)
    if spec.id not in read.table.columns:
        raise DataError(f"{path}: no id column {spec.id!r}")
    return EventInput(read.table, spec.id, spec.time, False, read.rows, read.rejects)


def events_from_logs(bundle: Bundle, raw: RawPaths) -> EventInput:
    """The labelled snapshot table a timeline bundle's raw logs make, as ``causeline build``
    would write it (each failure counted once by ``failure_counted``)."""
    if bundle.spec.timeline is None:
        raise DataError(f"{bundle.path}: raw logs need a bundle built from timelines; give "
                        "--events with a table instead")
    built = build_snapshots(bundle.spec.timeline, read_inputs(bundle.spec, raw))
    table = labelled_table(bundle.spec, built)
    text = [c for c in (bundle.spec.id, bundle.spec.entity) if c is not None]
    for column in text:
        if column in table.columns:
            table[column] = table[column].astype("string")
    return EventInput(table, bundle.spec.id, bundle.spec.time, False,
                      np.arange(1, len(table) + 1), empty_rejects(table.columns))


def latest_entries(table: pd.DataFrame, id_column: str) -> np.ndarray:
    """True for each event id's latest prediction-log entry and for every entry without an id.

    A client retry logs an event again; counting each copy would multiply group sizes and
    estimates. The latest entry has the latest ``log_logged_at`` (a time that cannot be read
    ranks before every other); among equal times the later position in the log wins. Entries
    with an empty id are never taken for one another.
    """
    keep = np.ones(len(table), dtype=bool)
    if id_column not in table.columns:
        return keep
    ids = table[id_column].astype("string")
    has_id = (ids.str.strip() != "").fillna(False).to_numpy(dtype=bool)
    times = utc_times(table, LOG_TIME)
    order = pd.DataFrame({"id": ids, "time": times, "position": np.arange(len(table))})[has_id]
    order = order.sort_values(["time", "position"], na_position="first", kind="stable")
    keep[has_id] = False
    keep[order.drop_duplicates("id", keep="last")["position"].to_numpy()] = True
    return keep


def event_labels(column: pd.Series, name: str) -> np.ndarray:
    """The label column as booleans, read the way training reads it (0/1, true/false, yes/no)."""
    return binary_column(column, name, "label")


def event_times(events: EventInput) -> pd.Series:
    """Each row's time (UTC), NaT where there is no time column or a value is not a time."""
    return utc_times(events.table, events.time_column)


@dataclass(frozen=True)
class Screened:
    """Which rows stay (``keep``), their features, which of those are events, and the rejects.

    ``foreseen`` counts labelled snapshots left out because a later snapshot counts the same
    failure (a table built from timelines, whose horizon spans several snapshots).
    """

    keep: np.ndarray
    reference: np.ndarray
    selected: np.ndarray
    rejects: pd.DataFrame
    foreseen: int = 0


def screen_rows(
    bundle: Bundle,
    table: pd.DataFrame,
    source_rows: np.ndarray,
    rejects: pd.DataFrame,
    predicted: bool,
    where: str = "",
) -> Screened:
    """Set aside rows with a bad cell or label, then pick the events among the rest.

    A group built on guessed values would mislead, so such rows go to the rejects. Events are
    the rows labelled as events, or with ``predicted`` those scored at or above the threshold.
    """
    spec = bundle.spec
    features = bundle.builder.transform(table)
    bad = cell_reasons(features.problems)
    if not predicted:
        if spec.target not in table.columns:
            raise DataError(
                f"{where}no label column {spec.target!r}; pass --predicted to group rows "
                "scored at or above the threshold"
            )
        bad = merge_reasons(bad, label_reasons(table[spec.target], spec.target))
    rejects = add_rejects(rejects, table, source_rows, bad)
    keep = keep_mask(len(table), bad)
    reference = features.values[keep]
    foreseen = 0
    if predicted:
        selected = probability(bundle, reference) >= bundle.manifest.decision.threshold
    else:
        selected = event_labels(table[keep][spec.target], spec.target)
        if spec.timeline is not None and FAILURE_COUNTED in table.columns:
            # Each failure once: by the last snapshot before it, not by every one that saw it.
            counted = to_numbers(table[keep][FAILURE_COUNTED]).fillna(1).to_numpy() == 1
            foreseen = int((selected & ~counted).sum())
            selected = selected & counted
    return Screened(keep, reference, np.asarray(selected, dtype=bool), rejects, foreseen)
