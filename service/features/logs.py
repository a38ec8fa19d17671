"""Raw logs in: readings, failures, actions and attributes, their times on one clock, and errors
that say which log, row and column a bad value is in.

Times become numbers once, here: int64 nanoseconds on a time clock, float cycles on a cycle
clock. Both the batch build and the online path read logs through these functions.
"""

from __future__ import annotations

import difflib
import hashlib
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from causeline.service.errors import DataError, quoted
from causeline.service.files.checksum import sha256_file
from causeline.service.files.tables import read_table, to_numbers
from causeline.service.spec.dataset import DatasetSpec
from causeline.service.spec.timeline import TimelineSpec, span_amount

NS = 1_000_000_000
UNIT_NS = {"m": 60 * NS, "h": 3600 * NS, "d": 86_400 * NS}
_TIME_RANGE = f"{pd.Timestamp.min:%Y-%m-%d} to {pd.Timestamp.max:%Y-%m-%d}"
_TIME_KINDS = {"string", "datetime", "datetime64", "date", "empty"}


@dataclass(frozen=True)
class TimelineInputs:
    """The raw logs: readings (required), failures, maintenance actions, static attributes."""

    readings: pd.DataFrame
    failures: pd.DataFrame | None = None
    actions: pd.DataFrame | None = None
    attributes: pd.DataFrame | None = None


@dataclass(frozen=True)
class Log:
    """One log's rows for known entities, sorted by (entity code, time), times as numbers."""

    codes: np.ndarray
    times: np.ndarray
    frame: pd.DataFrame


class LogValueError(DataError):
    """A value of a log (or a snapshot time) that cannot be used, with where it is: ``log``
    (``readings``, ``failures``, ``actions`` or ``at``), its ``row`` label (from 0) and
    ``column``, so the HTTP API can name the field; ``reason`` is the message without the place.
    """

    def __init__(
        self, reason: str, log: str, column: str | None = None, row: object | None = None
    ) -> None:
        self.reason, self.log, self.column, self.row = reason, log, column, row
        # Counted from 1 in the message, as the other table checks count rows.
        number = row + 1 if isinstance(row, int | np.integer) else row
        where = log + ("" if row is None else f", row {number}")
        where += "" if column is None or column == log else f", column {column!r}"
        super().__init__(f"{where}: {reason}")


class Clock:
    """Times as numbers: int64 nanoseconds on a time clock, float cycles on a cycle clock."""

    def __init__(self, spec: TimelineSpec) -> None:
        self.spec = spec
        self.cycles = spec.clock == "cycle"
        self.per_unit = 1.0 if self.cycles else float(UNIT_NS[spec.unit])

    def values(self, column: pd.Series, log: str, name: str) -> np.ndarray:
        """The column as clock numbers; the first value that is not one stops, located."""
        if self.cycles:
            numbers = to_numbers(column)
            # Infinity (also a JSON integer past float64's range) is no cycle either.
            cycles = numbers.to_numpy(dtype=np.float64, na_value=np.nan)
            self._refuse(column, ~np.isfinite(cycles), log, name, "is not a number (cycle)")
            return cycles
        # pandas reads a number as nanoseconds since 1970, so 1767225600 (seconds) or -0.0
        # would land in January 1970 without a word: on a time clock a number is refused.
        self._refuse(column, _numbers(column), log, name,
                     "is a number, not a time; write times as ISO 8601 text")
        moments = pd.to_datetime(column, errors="coerce", utc=True, format="mixed")
        moments = moments.dt.tz_convert(None)
        self._refuse(column, moments.isna().to_numpy(), log, name, "is not a time")
        # pandas parses far times at a coarser unit; the int64 nanoseconds this clock counts in
        # hold only 1677-09-21 to 2262-04-11, and a cast past them wraps round silently.
        outside = ((moments < pd.Timestamp.min) | (moments > pd.Timestamp.max)).to_numpy()
        self._refuse(column, outside, log, name,
                     f"is outside the times pandas can hold ({_TIME_RANGE})")
        return moments.dt.as_unit("ns").to_numpy().view(np.int64)

    @staticmethod
    def _refuse(column: pd.Series, bad: np.ndarray, log: str, name: str, reason: str) -> None:
        if not bad.any():
            return
        position = int(np.flatnonzero(bad)[0])
        # A single snapshot time needs no row; a log row does (the API names it).
        row = None if log == "at" and len(column) == 1 else column.index[position]
        raise LogValueError(f"{shown(column.iloc[position])} {reason}", log, name, row)

    def show(self, value: float | int) -> str:
        """A clock number as the text a user would write."""
        return f"{value:g}" if self.cycles else pd.Timestamp(int(value)).isoformat()

    def span(self, span: str | float) -> float | int:
        amount = span_amount(span, self.spec.clock)
        return amount if self.cycles else round(amount * NS)

    def column(self, times: np.ndarray) -> pd.Series:
        if self.cycles:
            whole = np.all(times == np.round(times))
            return pd.Series(times.astype(np.int64) if whole else times)
        return pd.Series(times.view("datetime64[ns]"))


@dataclass(frozen=True)
class RawPaths:
    """The raw logs on disk; only the readings are always needed."""

    readings: Path
    failures: Path | None = None
    actions: Path | None = None
    attributes: Path | None = None

    def __str__(self) -> str:
        """The logs as a message names them."""
        given = [(name, getattr(self, name)) for name in
                 ("readings", "failures", "actions", "attributes")]
        return "raw logs (" + ", ".join(f"{k} {v}" for k, v in given if v is not None) + ")"

    def fingerprint(self) -> str:
        """One sha256 over the files' own checksums, in a fixed order."""
        parts = [sha256_file(p) if p else "-" for p in
                 (self.readings, self.failures, self.actions, self.attributes)]
        return hashlib.sha256("\n".join(parts).encode()).hexdigest()


def timeline_of(dataset: DatasetSpec) -> TimelineSpec:
    """The data set's timeline section; a data set without one is an error here."""
    if dataset.timeline is None:
        raise DataError(f"the config of {dataset.name!r} has no timeline section")
    return dataset.timeline


def read_inputs(dataset: DatasetSpec, paths: RawPaths) -> TimelineInputs:
    """Read the raw logs, keeping entity columns as text."""
    spec = timeline_of(dataset)
    if spec.actions is not None and paths.actions is None:
        raise DataError("the config has an actions section; give the maintenance log (--actions)")
    if spec.attributes is not None and paths.attributes is None:
        raise DataError("the config has an attributes section; give them (--attributes)")

    def read(path: Path | None, entity: str | None) -> pd.DataFrame | None:
        if path is None:
            return None
        return read_table(path, text_columns=[entity] if entity else [])

    if paths.failures is None and not spec.failures.optional:
        raise DataError(
            "give the failure log (--failures); without it every entity would count as never "
            "failed and no snapshot as positive. If the timeline has no failures, say so with "
            "failures.optional: true in the config"
        )
    inputs = TimelineInputs(
        readings=read(paths.readings, spec.readings.entity),  # type: ignore[arg-type]
        failures=read(paths.failures, spec.failures.entity),
        actions=read(paths.actions, spec.actions.entity if spec.actions else None),
        attributes=read(paths.attributes, spec.attributes.entity if spec.attributes else None),
    )
    check_names(spec, inputs)
    return inputs


def check_names(spec: TimelineSpec, inputs: TimelineInputs) -> None:
    """Failure types and action kinds the config names must occur in the logs given: a typo
    would otherwise drop positives or build a feature that is empty everywhere, silently."""
    f = spec.failures
    if f.types and f.type_column is not None and inputs.failures is not None:
        require_columns(inputs.failures, "failures", [f.type_column])
        _named(inputs.failures[f.type_column], f.types, "failures.types", "failure log",
               f.type_column)
    a = spec.actions
    if a is not None and inputs.actions is not None:
        require_columns(inputs.actions, "actions", [a.kind_column])
        _named(inputs.actions[a.kind_column], a.kinds, "actions.kinds", "maintenance log",
               a.kind_column)


def _named(column: pd.Series, wanted: tuple[str, ...], key: str, log: str, name: str) -> None:
    present = sorted(set(column.dropna().astype(str)))
    for value in wanted:
        if value in present:
            continue
        close = difflib.get_close_matches(value, present, n=len(present), cutoff=0.0)
        shown = ", ".join(quoted(v, 40) for v in close[:8])
        more = f" and {len(present) - 8} more" if len(present) > 8 else ""
        raise DataError(
            f"{key}: {quoted(value, 40)} never occurs in the {log}'s column {name!r}, which "
            f"holds {shown or 'nothing'}{more} (closest first); check the spelling, or give a "
            "log that covers it"
        )


def readings_log(spec: TimelineSpec, frame: pd.DataFrame, clock: Clock) -> Log:
    r = spec.readings
    require_columns(frame, "readings", [r.entity, r.time, *r.measurements, *r.states])
    missing = frame[r.entity].isna().to_numpy()
    if missing.any():
        raise LogValueError("the entity is missing", "readings", r.entity,
                            frame.index[int(np.flatnonzero(missing)[0])])
    if len(frame) == 0:
        raise DataError("readings: no rows")
    out = pd.DataFrame({"__entity": frame[r.entity].astype(str).to_numpy()})
    for column in r.measurements:
        values = to_numbers(frame[column])
        bad = values.isna() & frame[column].notna()
        if bad.any():
            position = int(np.flatnonzero(bad.to_numpy())[0])
            raise LogValueError(f"{shown(frame[column].iloc[position])} is not a number",
                                "readings", column, frame.index[position])
        out[column] = values.to_numpy(dtype=np.float64)
    for column in r.states:
        out[column] = frame[column].to_numpy()
    return Log(np.empty(0), clock.values(frame[r.time], "readings", r.time), out)


def failure_filter(spec: TimelineSpec) -> Callable[[pd.DataFrame], np.ndarray] | None:
    f = spec.failures
    if not f.types or f.type_column is None:
        return None
    column, types = f.type_column, list(f.types)
    return lambda frame: frame[column].astype("string").isin(types).to_numpy(dtype=bool)


def event_log(
    entity: str, time: str, frame: pd.DataFrame | None, label: str, names: np.ndarray,
    clock: Clock, keep: Callable[[pd.DataFrame], np.ndarray] | None,
) -> Log:
    """A log's rows for known entities, sorted by (entity code, time)."""
    if frame is None:
        empty = np.empty(0, dtype=np.float64 if clock.cycles else np.int64)
        return Log(np.empty(0, dtype=np.int64), empty, pd.DataFrame())
    require_columns(frame, label, [entity, time])
    if keep is not None:
        frame = frame[keep(frame)]
    found = pd.Index(names).get_indexer(frame[entity].astype(str).to_numpy())
    known = found >= 0
    frame = frame[known]
    codes = found[known].astype(np.int64)
    times = clock.values(frame[time], label, time)  # before renumbering: errors name the row
    frame = frame.reset_index(drop=True)
    order = np.lexsort((times, codes))
    return Log(codes[order], times[order], frame.iloc[order].reset_index(drop=True))


def require_columns(frame: pd.DataFrame | None, label: str, columns: list[str]) -> None:
    if frame is None:
        raise DataError(f"{label}: the config needs this log but none was given")
    for column in dict.fromkeys(columns):
        if column not in frame.columns:
            raise DataError(f"{label}: column {column!r} is in the config but not in the data")


def _numbers(column: pd.Series) -> np.ndarray:
    """Where a column holds numbers (or booleans) rather than text or times."""
    if pd.api.types.is_numeric_dtype(column.dtype):
        return column.notna().to_numpy()
    if column.dtype != object or pd.api.types.infer_dtype(column, skipna=True) in _TIME_KINDS:
        return np.zeros(len(column), dtype=bool)
    return np.fromiter((isinstance(v, bool | int | float | np.number) for v in column),
                       dtype=bool, count=len(column))


def shown(value: object) -> str:
    """A value as an error message shows it: short, and without NumPy's type names."""
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, str):
        return quoted(value, 40)
    text = str(value)
    return text if len(text) <= 40 else text[:37] + "..."
