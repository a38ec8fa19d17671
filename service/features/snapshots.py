"""From raw timelines to snapshots: look-back features at time t and a horizon label after it.

One function builds features for a batch (``build_snapshots``, used by ``causeline build`` and
``train``) and for one entity online (``entity_features``, for ``explain`` and the service), so
training and serving compute features the same way. Features at t read only rows with
timestamp <= t; ``check_no_leakage`` probes any builder for that. Label rules are in
:mod:`service.timeline_labels`.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from causeline.service.bundle.load import sha256_file
from causeline.service.errors import DataError, quoted
from causeline.service.features.labels import (
    CENSORED,
    DOWN,
    NEGATIVE,
    POSITIVE,
    EventLog,
    label_status,
)
from causeline.service.features.windows import Prefix, last_valid_index, rank
from causeline.service.files.tables import read_table, to_numbers
from causeline.service.spec.dataset import DatasetSpec, TimelineSpec, span_amount

STATUS = "snapshot_status"
LATEST = "latest"
_NS = 1_000_000_000
_UNIT_NS = {"m": 60 * _NS, "h": 3600 * _NS, "d": 86_400 * _NS}
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
class _Log:
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
        shown = row + 1 if isinstance(row, int | np.integer) else row
        where = log + ("" if row is None else f", row {shown}")
        where += "" if column is None or column == log else f", column {column!r}"
        super().__init__(f"{where}: {reason}")


class _Clock:
    """Times as numbers: int64 nanoseconds on a time clock, float cycles on a cycle clock."""

    def __init__(self, spec: TimelineSpec) -> None:
        self.spec = spec
        self.cycles = spec.clock == "cycle"
        self.per_unit = 1.0 if self.cycles else float(_UNIT_NS[spec.unit])

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
        raise LogValueError(f"{_shown(column.iloc[position])} {reason}", log, name, row)

    def show(self, value: float | int) -> str:
        """A clock number as the text a user would write."""
        return f"{value:g}" if self.cycles else pd.Timestamp(int(value)).isoformat()

    def span(self, span: str | float) -> float | int:
        amount = span_amount(span, self.spec.clock)
        return amount if self.cycles else round(amount * _NS)

    def column(self, times: np.ndarray) -> pd.Series:
        if self.cycles:
            whole = np.all(times == np.round(times))
            return pd.Series(times.astype(np.int64) if whole else times)
        return pd.Series(times.view("datetime64[ns]"))


@dataclass(frozen=True)
class RawPaths:
    """The raw logs on disk; only the readings are always needed."""

    readings: Path
    events: Path | None = None
    actions: Path | None = None
    attributes: Path | None = None

    def fingerprint(self) -> str:
        """One sha256 over the files' own checksums, in a fixed order."""
        parts = [sha256_file(p) if p else "-" for p in
                 (self.readings, self.events, self.actions, self.attributes)]
        return hashlib.sha256("\n".join(parts).encode()).hexdigest()


def read_inputs(dataset: DatasetSpec, paths: RawPaths) -> TimelineInputs:
    """Read the raw logs, keeping entity columns as text."""
    spec = _timeline(dataset)
    if spec.actions is not None and paths.actions is None:
        raise DataError("the config has an actions section; give the maintenance log (--actions)")
    if spec.attributes is not None and paths.attributes is None:
        raise DataError("the config has an attributes section; give them (--attributes)")

    def read(path: Path | None, entity: str | None) -> pd.DataFrame | None:
        if path is None:
            return None
        return read_table(path, text_columns=[entity] if entity else [])

    return TimelineInputs(
        readings=read(paths.readings, spec.readings.entity),  # type: ignore[arg-type]
        failures=read(paths.events, spec.failures.entity),
        actions=read(paths.actions, spec.actions.entity if spec.actions else None),
        attributes=read(paths.attributes, spec.attributes.entity if spec.attributes else None),
    )


def feature_names(spec: TimelineSpec) -> list[str]:
    """The columns the builder adds, in order: what a config's ``features`` may name."""
    return spec.feature_names


def build_snapshots(
    spec: TimelineSpec, inputs: TimelineInputs, at: pd.Series | str | None = None
) -> pd.DataFrame:
    """Snapshots with their features and label status, one row per (entity, snapshot time).

    Columns: the readings' entity and time columns, every feature in ``feature_names(spec)``,
    then ``snapshot_status`` (positive, negative, censored or down). ``at`` overrides the
    cadence with explicit snapshot times, or ``"latest"`` for the latest reading, for a
    single entity (the online path).
    """
    clock = _Clock(spec)
    readings = _readings(spec, inputs.readings, clock)
    # Hash-based factorising: sorting a million strings would cost more than the whole build.
    codes, uniques = pd.factorize(readings.frame["__entity"], sort=True)
    names = np.asarray(uniques, dtype=object)
    order = np.lexsort((readings.times, codes))
    codes, times = codes[order], readings.times[order]
    frame = readings.frame.iloc[order].reset_index(drop=True)
    start = np.searchsorted(codes, np.arange(names.size), side="left")

    if at is not None:
        if names.size != 1:
            shown = ", ".join(_shown(name) for name in names[:3])
            raise LogValueError(
                f"holds {names.size} entities ({shown}{', ...' if names.size > 3 else ''}); "
                "a snapshot at a given time (or the latest reading) is built for one entity",
                "readings", spec.readings.entity)
        if isinstance(at, str) and at == LATEST:
            snap_times = times[-1:]
        else:
            snap_times = np.sort(clock.values(pd.Series(at).reset_index(drop=True), "at", "at"))
            if snap_times[0] < times[0]:
                # Every look-back feature would be missing: a snapshot of nothing, not of t.
                raise LogValueError(f"no readings at or before {clock.show(snap_times[0])}", "at")
        snap_codes = np.zeros(snap_times.size, dtype=np.int64)
    else:
        snap_codes, snap_times = _cadence(spec, clock, codes, times, start, names.size)

    out: dict[str, object] = {
        spec.readings.entity: names[snap_codes],
        spec.readings.time: clock.column(snap_times),
    }
    out.update(_window_features(spec, clock, codes, times, frame, start, snap_codes, snap_times))
    hi = rank(codes, times, snap_codes, snap_times, inclusive=True)
    for state in spec.readings.states:
        latest = last_valid_index(codes, frame[state].notna().to_numpy())[np.maximum(hi - 1, 0)]
        found = (hi > start[snap_codes]) & (latest >= start[snap_codes])
        values = frame[state].to_numpy(dtype=object)[np.maximum(latest, 0)]
        out[state] = pd.Series(np.where(found, values, None), dtype=frame[state].dtype)

    failures = _events(spec.failures.entity, spec.failures.time, inputs.failures, "failures",
                       names, clock, _failure_filter(spec))
    failure_log = EventLog(failures.codes, failures.times)
    out["failures_before"] = failure_log.count_through(snap_codes, snap_times)
    previous, found = failure_log.latest(snap_codes, snap_times)
    out[f"since_failure_{spec.time_suffix}"] = _since(snap_times, previous, found, clock)
    repairs = None
    if spec.actions is not None:
        # Unlike failures (none logged is an answer), missing actions would fake 'never done'.
        _require(inputs.actions, "actions", [spec.actions.kind_column])
        actions = _events(spec.actions.entity, spec.actions.time, inputs.actions, "actions",
                          names, clock, None)
        kinds = actions.frame[spec.actions.kind_column].astype("string").to_numpy()
        for kind in spec.actions.kinds:
            chosen = kinds == kind
            log = EventLog(actions.codes[chosen], actions.times[chosen])
            previous, found = log.latest(snap_codes, snap_times)
            out[spec.action_feature(kind)] = _since(snap_times, previous, found, clock)
        if spec.down.until_action:
            chosen = np.isin(kinds, list(spec.down.until_action))
            repairs = EventLog(actions.codes[chosen], actions.times[chosen])
    table = pd.DataFrame(out)
    if spec.attributes is not None:
        table = _join_attributes(spec, table, inputs.attributes)
    if spec.calendar:
        moments = pd.to_datetime(snap_times.view("datetime64[ns]"))
        parts = {"month": moments.month, "weekday": moments.day_of_week, "hour": moments.hour}
        for part in spec.calendar:
            table[part] = np.asarray(parts[part], dtype=np.int64)

    # The end of observation: the entity's last reading or last failure, whichever is later.
    end = times[np.append(start[1:], codes.size) - 1].copy()
    np.maximum.at(end, failures.codes, failures.times)
    table[STATUS] = label_status(
        snap_codes, snap_times, failure_log, repairs, clock.span(spec.horizon),
        clock.span(spec.down.after_failure), end[snap_codes],
    )
    return table


def label_counts(table: pd.DataFrame) -> dict[str, int]:
    """How many snapshots of each status a built table holds."""
    counts = table[STATUS].value_counts()
    return {status: int(counts.get(status, 0)) for status in (POSITIVE, NEGATIVE, CENSORED, DOWN)}


def labelled_table(dataset: DatasetSpec, built: pd.DataFrame) -> pd.DataFrame:
    """The table ``train`` consumes: usable snapshots, named as the data-set spec says.

    Positive and negative snapshots stay (censored ones too under ``censored: negative``);
    down snapshots never do. Adds the id column (``<entity>@<time>``) and the 0/1 target.
    """
    spec = _timeline(dataset)
    keep = built[STATUS].isin([POSITIVE, NEGATIVE])
    if spec.censored == "negative":
        keep |= built[STATUS] == CENSORED
    table = built[keep.to_numpy()].reset_index(drop=True)
    table = _name_columns(dataset, table)
    table.insert(len(table.columns) - 1, dataset.target,
                 (table[STATUS] == POSITIVE).astype(np.int64))
    return table.drop(columns=[STATUS])


def entity_features(
    dataset: DatasetSpec, inputs: TimelineInputs, at: object | None = None
) -> pd.DataFrame:
    """The feature row of one entity at ``at`` (default: its latest reading), built by the same
    code as the batch build; give at least the readings of the look-back windows."""
    spec = _timeline(dataset)
    built = build_snapshots(spec, inputs, at=LATEST if at is None else pd.Series([at]))
    return _name_columns(dataset, built).drop(columns=[STATUS])


def snapshot_features(
    dataset: DatasetSpec, inputs: TimelineInputs, latest: bool = False
) -> pd.DataFrame:
    """Every snapshot the cadence gives (or each entity's latest), named as the spec says, for
    scoring: down and censored snapshots too, since scoring needs no label."""
    built = _name_columns(dataset, build_snapshots(_timeline(dataset), inputs))
    if latest:
        entity = dataset.entity or _timeline(dataset).readings.entity
        built = built.groupby(entity, sort=False).tail(1).reset_index(drop=True)
    return built.drop(columns=[STATUS])


def check_no_leakage(
    builder: Callable[[pd.DataFrame], pd.DataFrame],
    readings: pd.DataFrame,
    entity: str,
    time: str,
    measurements: list[str],
    seed: int = 0,
) -> list[str]:
    """Columns of ``builder``'s output that change at some time t when only rows after t change.

    Picks a cut-off inside each entity's readings, scales, shifts and thins every reading after
    it, rebuilds, and compares each snapshot at or before the cut-off. ``builder`` maps readings
    to a table with the same ``entity`` and ``time`` columns. An empty list means no leak seen.
    """
    rng = np.random.default_rng(seed)
    times = pd.Series(readings[time].to_numpy())
    ordered = times.groupby(readings[entity].to_numpy()).rank(method="first", pct=True)
    cutoff_share = rng.uniform(0.3, 0.7)
    cut_rank = ordered.to_numpy() <= cutoff_share
    cutoff = times[cut_rank].groupby(readings[entity].to_numpy()[cut_rank]).max()
    limit = readings[entity].map(cutoff).to_numpy()
    later = ~pd.isna(limit) & (times.to_numpy() > limit)
    changed = readings.copy()
    for column in measurements:
        values = changed[column].to_numpy(dtype=np.float64).copy()
        values[later] = values[later] * rng.uniform(2.0, 5.0) + rng.normal(0, 100, later.sum())
        changed[column] = values
    changed = changed[~later | (rng.uniform(size=len(changed)) < 0.6)]
    before, after = builder(readings), builder(changed)
    keys = [entity, time]
    merged = before.merge(after, on=keys, suffixes=("", "__probe"))
    early = merged[time].to_numpy() <= merged[entity].map(cutoff).to_numpy()
    leaking: list[str] = []
    for column in before.columns:
        if column in keys:
            continue
        a, b = merged[column][early], merged[f"{column}__probe"][early]
        same = (a == b) | (a.isna() & b.isna())
        if not bool(same.all()):
            leaking.append(column)
    if not early.any():
        raise DataError("the leakage probe found no snapshot before its cut-off to compare")
    return leaking


def _timeline(dataset: DatasetSpec) -> TimelineSpec:
    if dataset.timeline is None:
        raise DataError(f"the config of {dataset.name!r} has no timeline section")
    return dataset.timeline


def _name_columns(dataset: DatasetSpec, table: pd.DataFrame) -> pd.DataFrame:
    spec = _timeline(dataset)
    rename = {spec.readings.entity: dataset.entity or spec.readings.entity,
              spec.readings.time: dataset.time or spec.readings.time}
    table = table.rename(columns=rename)
    entity, time = rename[spec.readings.entity], rename[spec.readings.time]
    when = table[time]
    text = when.dt.strftime("%Y-%m-%dT%H:%M:%S") if spec.clock == "time" else when.astype(str)
    table.insert(0, dataset.id, (table[entity].astype(str) + "@" + text).astype("string"))
    return table


def _readings(spec: TimelineSpec, frame: pd.DataFrame, clock: _Clock) -> _Log:
    r = spec.readings
    _require(frame, "readings", [r.entity, r.time, *r.measurements, *r.states])
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
            raise LogValueError(f"{_shown(frame[column].iloc[position])} is not a number",
                                "readings", column, frame.index[position])
        out[column] = values.to_numpy(dtype=np.float64)
    for column in r.states:
        out[column] = frame[column].to_numpy()
    return _Log(np.empty(0), clock.values(frame[r.time], "readings", r.time), out)


def _failure_filter(spec: TimelineSpec) -> Callable[[pd.DataFrame], np.ndarray] | None:
    f = spec.failures
    if not f.types or f.type_column is None:
        return None
    column, types = f.type_column, list(f.types)
    return lambda frame: frame[column].astype("string").isin(types).to_numpy(dtype=bool)


def _events(
    entity: str, time: str, frame: pd.DataFrame | None, label: str, names: np.ndarray,
    clock: _Clock, keep: Callable[[pd.DataFrame], np.ndarray] | None,
) -> _Log:
    """A log's rows for known entities, sorted by (entity code, time)."""
    if frame is None:
        empty = np.empty(0, dtype=np.float64 if clock.cycles else np.int64)
        return _Log(np.empty(0, dtype=np.int64), empty, pd.DataFrame())
    _require(frame, label, [entity, time])
    if keep is not None:
        frame = frame[keep(frame)]
    found = pd.Index(names).get_indexer(frame[entity].astype(str).to_numpy())
    known = found >= 0
    frame = frame[known]
    codes = found[known].astype(np.int64)
    times = clock.values(frame[time], label, time)  # before renumbering: errors name the row
    frame = frame.reset_index(drop=True)
    order = np.lexsort((times, codes))
    return _Log(codes[order], times[order], frame.iloc[order].reset_index(drop=True))


def _require(frame: pd.DataFrame | None, label: str, columns: list[str]) -> None:
    if frame is None:
        raise DataError(f"{label}: the config needs this log but none was given")
    for column in dict.fromkeys(columns):
        if column not in frame.columns:
            raise DataError(f"{label}: column {column!r} is in the config but not in the data")


def _cadence(
    spec: TimelineSpec, clock: _Clock, codes: np.ndarray, times: np.ndarray, start: np.ndarray,
    entities: int,
) -> tuple[np.ndarray, np.ndarray]:
    """Snapshot (entity code, time) pairs, sorted, for the configured cadence."""
    if spec.snapshots.every == "reading":
        distinct = np.ones(codes.size, dtype=bool)
        distinct[1:] = (codes[1:] != codes[:-1]) | (times[1:] != times[:-1])
        return codes[distinct], times[distinct]
    period = clock.span(spec.snapshots.every)
    offset: float | int = 0
    if spec.snapshots.at:
        hours, minutes = (int(part) for part in spec.snapshots.at.split(":"))
        offset = (hours * 3600 + minutes * 60) * _NS
    first = times[start]
    last = times[np.append(start[1:], codes.size) - 1]
    if clock.cycles:
        k_first = np.ceil((first - offset) / period).astype(np.int64)
        k_last = np.floor((last - offset) / period).astype(np.int64)
    else:
        k_first = -((offset - first) // period)
        k_last = (last - offset) // period
    counts = np.maximum(k_last - k_first + 1, 0)
    snap_codes = np.repeat(np.arange(entities), counts)
    steps = np.arange(counts.sum()) - np.repeat(np.cumsum(counts) - counts, counts)
    k = np.repeat(k_first, counts) + steps
    snap_times = k * period + offset
    return snap_codes, snap_times.astype(times.dtype)


def _window_features(
    spec: TimelineSpec, clock: _Clock, codes: np.ndarray, times: np.ndarray,
    frame: pd.DataFrame, start: np.ndarray, snap_codes: np.ndarray, snap_times: np.ndarray,
) -> dict[str, np.ndarray]:
    hi = rank(codes, times, snap_codes, snap_times, inclusive=True)
    first = start[snap_codes]
    elapsed = (times - times[start[codes]]).astype(np.float64) / clock.per_unit
    out: dict[str, np.ndarray] = {}
    features = spec.window_features()
    limits: dict[str, set[float]] = {}
    for _, index, measurement, aggregation in features:
        if aggregation == "count_above":
            limits.setdefault(measurement, set()).add(spec.windows[index].limits[measurement])
    used = list(dict.fromkeys(measurement for _, _, measurement, _ in features))
    prefix = Prefix(
        codes, {m: frame[m].to_numpy(dtype=np.float64) for m in used}, elapsed, limits,
        {m for _, _, m, aggregation in features if aggregation == "slope"},
    )
    for index, window in enumerate(spec.windows):
        if window.readings is not None:
            lo = np.maximum(first, hi - window.readings)
        else:
            lo = rank(codes, times, snap_codes, snap_times - clock.span(window.span or 0), True)
            lo = np.maximum(lo, first)
        lo = np.minimum(lo, hi)
        mine = [(name, measurement, aggregation)
                for name, w, measurement, aggregation in features if w == index]
        for measurement in dict.fromkeys(m for _, m, _ in mine):
            wanted = [(aggregation, window.limits.get(measurement))
                      for _, m, aggregation in mine if m == measurement]
            values = prefix.aggregate(measurement, lo, hi, first, wanted)
            names = [name for name, m, _ in mine if m == measurement]
            out.update(zip(names, values, strict=True))
    return out


def _since(now: np.ndarray, then: np.ndarray, found: np.ndarray, clock: _Clock) -> np.ndarray:
    elapsed = (now - then).astype(np.float64) / clock.per_unit
    return np.where(found, elapsed, np.nan)


def _join_attributes(
    spec: TimelineSpec, table: pd.DataFrame, frame: pd.DataFrame | None
) -> pd.DataFrame:
    a = spec.attributes
    assert a is not None
    _require(frame, "attributes", [a.entity, *a.columns])
    assert frame is not None
    keys = frame[a.entity].astype(str)
    if keys.duplicated().any():
        raise DataError(f"attributes: entity {keys[keys.duplicated()].iloc[0]!r} has two rows")
    lookup = frame[list(a.columns)].set_axis(keys.to_numpy())
    joined = lookup.reindex(table[spec.readings.entity].to_numpy()).reset_index(drop=True)
    return pd.concat([table.reset_index(drop=True), joined], axis=1)


def _numbers(column: pd.Series) -> np.ndarray:
    """Where a column holds numbers (or booleans) rather than text or times."""
    if pd.api.types.is_numeric_dtype(column.dtype):
        return column.notna().to_numpy()
    if column.dtype != object or pd.api.types.infer_dtype(column, skipna=True) in _TIME_KINDS:
        return np.zeros(len(column), dtype=bool)
    return np.fromiter((isinstance(v, bool | int | float | np.number) for v in column),
                       dtype=bool, count=len(column))


def _shown(value: object) -> str:
    """A value as an error message shows it: short, and without NumPy's type names."""
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, str):
        return quoted(value, 40)
    text = str(value)
    return text if len(text) <= 40 else text[:37] + "..."
