"""From raw timelines to snapshots: look-back features at time t and a horizon label after it.

One function builds features for a batch (``build_snapshots``, used by ``causeline build`` and
``train``) and for one entity online (``entity_features``, for ``explain`` and the service), so
training and serving compute features the same way. Features at t read only rows with
timestamp <= t (the tests probe every builder for look-ahead leakage). Logs are read in
:mod:`causeline.service.features.logs`, label rules are in :mod:`causeline.service.features.labels`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from causeline.service.errors import DataError
from causeline.service.features.labels import (
    CENSORED,
    DOWN,
    DOWN_REASONS,
    NEGATIVE,
    POSITIVE,
    DownSpans,
    EventLog,
    down_reasons,
    label_status,
)
from causeline.service.features.logs import (
    NS,
    Clock,
    Log,
    LogValueError,
    TimelineInputs,
    event_log,
    failure_filter,
    readings_log,
    require_columns,
    shown,
    timeline_of,
)
from causeline.service.features.windows import Prefix, last_valid_index, rank
from causeline.service.spec.dataset import DatasetSpec
from causeline.service.spec.timeline import WHOLE_OR_NOT, TimelineSpec

STATUS = "snapshot_status"
DOWN_RULE = "down_rule"  # why a down snapshot is down (labels.DOWN_REASONS), else empty
# Beside the target in the labelled table: the failure a positive snapshot foresees, and 1 on
# the snapshot that counts it (the last before it), so the root-cause job counts it once.
FAILURE_TIME = "failure_time"
FAILURE_COUNTED = "failure_counted"
THIN = "thin_windows"  # table.attrs: per window index, snapshots its coverage rules blanked
LATEST = "latest"
NOW = "now"


def build_snapshots(
    spec: TimelineSpec, inputs: TimelineInputs, at: pd.Series | str | None = None,
    as_of: object | None = None,
) -> pd.DataFrame:
    """Snapshots with their features and label status, one row per (entity, snapshot time).

    Columns: the readings' entity and time columns, every name in ``spec.feature_names``,
    then ``snapshot_status`` (positive, negative, censored or down). ``at`` overrides the
    cadence with explicit snapshot times, or ``"latest"`` for the latest reading, for a
    single entity (the online path); ``"now"`` gives every entity one snapshot at the latest
    moment its logs know of (its latest reading or failure, whichever is later), or at
    ``as_of`` for every entity with a reading by then; a snapshot after a failure the entity
    has not come back from is ``down``.
    """
    clock = Clock(spec)
    readings = readings_log(spec, inputs.readings, clock)
    # Hash-based factorising: sorting a million strings would cost more than the whole build.
    codes, uniques = pd.factorize(readings.frame["__entity"], sort=True)
    names = np.asarray(uniques, dtype=object)
    order = np.lexsort((readings.times, codes))
    codes, times = codes[order], readings.times[order]
    frame = readings.frame.iloc[order].reset_index(drop=True)
    start = np.searchsorted(codes, np.arange(names.size), side="left")

    failures = event_log(spec.failures.entity, spec.failures.time, inputs.failures, "failures",
                         names, clock, failure_filter(spec))
    # Coverage counts from each entity's first reading ever, whatever rows are kept below.
    origin = times[start]
    if isinstance(at, str) and at == NOW:
        snap_codes, snap_times = _now(clock, codes, times, start, failures, as_of)
        # One snapshot per entity reads only its latest rows: keep those, not the year.
        kept = _recent(spec, clock, codes, times, frame, start, snap_codes, snap_times)
        codes, times = codes[kept], times[kept]
        frame = frame.iloc[kept].reset_index(drop=True)
        start = np.searchsorted(codes, np.arange(names.size), side="left")
    elif at is not None:
        if names.size != 1:
            listed = ", ".join(shown(name) for name in names[:3])
            raise LogValueError(
                f"holds {names.size} entities ({listed}{', ...' if names.size > 3 else ''}); "
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
    windowed, thin = _window_features(spec, clock, codes, times, frame, start, snap_codes,
                                      snap_times, origin)
    out.update(windowed)
    hi = rank(codes, times, snap_codes, snap_times, inclusive=True)
    for state in spec.readings.states:
        latest = last_valid_index(codes, frame[state].notna().to_numpy())[np.maximum(hi - 1, 0)]
        found = (hi > start[snap_codes]) & (latest >= start[snap_codes])
        values = frame[state].to_numpy(dtype=object)[np.maximum(latest, 0)]
        out[state] = pd.Series(np.where(found, values, None), dtype=frame[state].dtype)

    failure_log = EventLog(failures.codes, failures.times)
    out["failures_before"] = failure_log.count_through(snap_codes, snap_times)
    previous, found = failure_log.latest(snap_codes, snap_times)
    out[f"since_failure_{spec.time_suffix}"] = _since(snap_times, previous, found, clock)
    kinds = np.empty(0, dtype=object)
    actions = None
    if spec.actions is not None:
        # Unlike failures (none logged is an answer), missing actions would fake 'never done'.
        require_columns(inputs.actions, "actions", [spec.actions.kind_column])
        actions = event_log(spec.actions.entity, spec.actions.time, inputs.actions, "actions",
                          names, clock, None)
        kinds = actions.frame[spec.actions.kind_column].astype("string").to_numpy()
        for kind in spec.actions.kinds:
            chosen = kinds == kind
            log = EventLog(actions.codes[chosen], actions.times[chosen])
            previous, found = log.latest(snap_codes, snap_times)
            out[spec.action_feature(kind)] = _since(snap_times, previous, found, clock)
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
    reasons = down_reasons(
        snap_codes, snap_times, failure_log, _failure_rules(spec, failures),
        _down_spans(spec, clock, actions, kinds), EventLog(codes, times),
        None if spec.down.stale_after is None else clock.span(spec.down.stale_after),
    )
    table[STATUS] = label_status(
        snap_codes, snap_times, failure_log, clock.span(spec.horizon), reasons != "",
        end[snap_codes],
    )
    table[DOWN_RULE] = reasons
    table.attrs[THIN] = thin
    # Which failure a positive snapshot foresees, so a failure foreseen by several snapshots
    # can be counted once (labelled_table marks the one that counts it).
    upcoming, _ = failure_log.next_after(snap_codes, snap_times)
    positive = (table[STATUS] == POSITIVE).to_numpy()
    if clock.cycles:
        table[FAILURE_TIME] = np.where(positive, upcoming.astype(np.float64), np.nan)
    else:
        missing = np.iinfo(np.int64).min  # NaT
        table[FAILURE_TIME] = np.where(positive, upcoming, missing).view("datetime64[ns]")
    return table


def _now(
    clock: Clock, codes: np.ndarray, times: np.ndarray, start: np.ndarray, failures: Log,
    as_of: object | None,
) -> tuple[np.ndarray, np.ndarray]:
    """One snapshot per entity: at ``as_of`` for those with a reading by then, else at the
    latest moment the logs know of, its latest reading or failure, whichever is later."""
    last = times[np.append(start[1:], codes.size) - 1].copy()
    entities = np.arange(start.size)
    if as_of is not None:
        moment = clock.values(pd.Series([as_of]), "at", "--as-of")[0]
        seen = times[start] <= moment
        return entities[seen], np.full(int(seen.sum()), moment, dtype=times.dtype)
    np.maximum.at(last, failures.codes, failures.times)
    return entities, last


def _recent(
    spec: TimelineSpec, clock: Clock, codes: np.ndarray, times: np.ndarray, frame: pd.DataFrame,
    start: np.ndarray, snap_codes: np.ndarray, snap_times: np.ndarray,
) -> np.ndarray:
    """Positions of the rows one snapshot per entity reads: the longest window's rows before
    it (by span, or the last N readings), the entity's latest row (for the down rules) and the
    latest valid row of each state column. Sorted, so the logs' order is kept."""
    if snap_codes.size == 0:
        return np.empty(0, dtype=np.int64)
    hi = rank(codes, times, snap_codes, snap_times, inclusive=True)
    first = start[snap_codes]
    lo = hi - 1  # the latest row at or before the snapshot
    spans = [clock.span(w.span) for w in spec.windows if w.span is not None]
    if spans:
        lo = np.minimum(lo, rank(codes, times, snap_codes, snap_times - max(spans), True))
    counts = [w.readings for w in spec.windows if w.readings is not None]
    if counts:
        lo = np.minimum(lo, hi - max(counts))
    lo = np.minimum(np.maximum(lo, first), hi)
    sizes = hi - lo
    offsets = np.arange(sizes.sum()) - np.repeat(np.cumsum(sizes) - sizes, sizes)
    parts = [np.repeat(lo, sizes) + offsets]
    for state in spec.readings.states:
        valid = np.flatnonzero(frame[state].notna().to_numpy())
        latest = valid[np.maximum(np.searchsorted(valid, hi) - 1, 0)] if valid.size else hi
        parts.append(latest[(valid.size > 0) & (latest >= first) & (latest < hi)])
    return np.unique(np.concatenate(parts))


def _failure_rules(spec: TimelineSpec, failures: Log) -> np.ndarray:
    """Per failure row, the index of its down rule: 0 the default, then ``by_type``'s order."""
    types = list(spec.down.by_type)
    if not types or spec.failures.type_column is None or failures.codes.size == 0:
        return np.zeros(failures.codes.size, dtype=np.int64)
    kind = failures.frame[spec.failures.type_column].astype("string").to_numpy()
    out = np.zeros(failures.codes.size, dtype=np.int64)
    for index, name in enumerate(types, start=1):
        out[kind == name] = index
    return out


def _down_spans(
    spec: TimelineSpec, clock: Clock, actions: Log | None, kinds: np.ndarray
) -> list[DownSpans]:
    """The down rules in clock units, with each rule's repair log."""
    out = []
    for rule in spec.down.rules():
        repairs = None
        if rule.until_action and actions is not None:
            chosen = np.isin(kinds, list(rule.until_action))
            repairs = EventLog(actions.codes[chosen], actions.times[chosen])
        cap = np.inf if rule.max is None else float(clock.span(rule.max))
        out.append(DownSpans(float(clock.span(rule.after_failure)), cap, rule.until_readings,
                             repairs))
    return out


def label_counts(table: pd.DataFrame) -> dict[str, int]:
    """How many snapshots of each status a built table holds."""
    counts = table[STATUS].value_counts()
    out = {status: int(counts.get(status, 0)) for status in (POSITIVE, NEGATIVE, CENSORED, DOWN)}
    reasons = table[DOWN_RULE].value_counts()
    out.update({f"down: {reason}": int(reasons.get(reason, 0)) for reason in DOWN_REASONS})
    return out


def coverage_notes(spec: TimelineSpec, table: pd.DataFrame) -> list[str]:
    """One line per window whose coverage rules blanked aggregates, for build and train."""
    notes = []
    for index, count in sorted(table.attrs.get(THIN, {}).items()):
        if count:
            window = spec.windows[index]
            notes.append(
                f"windows[{index}] ({spec.window_tag(window)}): {count:,} of {len(table):,} "
                f"snapshots cover under {window.min_coverage:.0%} of the window or hold under "
                f"{window.min_readings} reading(s) of a measurement; their aggregates are "
                "missing (min_coverage, min_readings)")
    return notes


def labelled_table(dataset: DatasetSpec, built: pd.DataFrame) -> pd.DataFrame:
    """The table ``train`` consumes: usable snapshots, named as the data-set spec says.

    Positive and negative snapshots stay (censored ones too under ``censored: negative``);
    down snapshots never do. Adds the id column (``<entity>@<time>``) and the 0/1 target, then
    ``failure_time`` (the failure a positive snapshot foresees) and ``failure_counted`` (1 on
    the last snapshot before each failure: where a horizon spans several snapshots, the one
    that counts the failure once).
    """
    spec = timeline_of(dataset)
    keep = built[STATUS].isin([POSITIVE, NEGATIVE])
    if spec.censored == "negative":
        keep |= built[STATUS] == CENSORED
    table = built[keep.to_numpy()].reset_index(drop=True)
    # The last positive snapshot before each failure counts it; earlier ones foresee it too.
    positive = (table[STATUS] == POSITIVE).to_numpy()
    keys = [spec.readings.entity, FAILURE_TIME]
    latest = table[positive].groupby(keys, sort=False)[spec.readings.time].transform("max")
    counted = np.zeros(len(table), dtype=np.int64)
    counted[positive] = (table.loc[positive, spec.readings.time] == latest).to_numpy()
    table = _name_columns(dataset, table)
    failure_time = table.pop(FAILURE_TIME)
    table.insert(len(table.columns) - 1, dataset.target, positive.astype(np.int64))
    table = table.drop(columns=[STATUS, DOWN_RULE])
    table[FAILURE_TIME] = failure_time
    table[FAILURE_COUNTED] = counted
    return table


def entity_features(
    dataset: DatasetSpec, inputs: TimelineInputs, at: object | None = None
) -> pd.DataFrame:
    """The feature row of one entity at ``at`` (default: the latest moment its logs know of,
    its latest reading or failure), built by the same code as the batch build; give at least
    the readings of the look-back windows. The ``down_rule`` column says why the entity is
    down then (empty when it is up): a down entity is not to be scored."""
    spec = timeline_of(dataset)
    if at is None:
        built = build_snapshots(spec, inputs, at=NOW)
        if len(built) > 1:
            listed = ", ".join(shown(name) for name in built[spec.readings.entity][:3])
            raise LogValueError(
                f"holds {len(built)} entities ({listed}{', ...' if len(built) > 3 else ''}); "
                "a snapshot at a given time (or now) is built for one entity",
                "readings", spec.readings.entity)
    else:
        built = build_snapshots(spec, inputs, at=pd.Series([at]))
    return _name_columns(dataset, built).drop(columns=[STATUS, FAILURE_TIME])


def snapshot_features(dataset: DatasetSpec, inputs: TimelineInputs) -> pd.DataFrame:
    """Every snapshot the cadence gives, named as the spec says, for scoring: down and censored
    snapshots too, since scoring needs no label."""
    built = _name_columns(dataset, build_snapshots(timeline_of(dataset), inputs))
    return built.drop(columns=[STATUS, DOWN_RULE, FAILURE_TIME])


@dataclass(frozen=True)
class Current:
    """The fleet now: a feature row per entity that is up, and the entities that are down."""

    table: pd.DataFrame
    down: pd.DataFrame  # entity, snapshot time, why it is down


def current_features(
    dataset: DatasetSpec, inputs: TimelineInputs, as_of: object | None = None
) -> Current:
    """Each entity at the latest moment its logs know of (or ``as_of``), built with the same
    look-back windows as training, only those snapshots: scoring the fleet now costs a pass
    over the logs, not the year's snapshots. Entities down then (a failure they have not
    come back from, by the config's down rules) are set apart, not scored."""
    built = _name_columns(dataset, build_snapshots(timeline_of(dataset), inputs, NOW, as_of))
    down = (built[STATUS] == DOWN).to_numpy()
    entity = dataset.entity or timeline_of(dataset).readings.entity
    time = dataset.time or timeline_of(dataset).readings.time
    apart = built.loc[down, [entity, time, DOWN_RULE]].reset_index(drop=True)
    table = built[~down].reset_index(drop=True).drop(columns=[STATUS, DOWN_RULE, FAILURE_TIME])
    return Current(table, apart)


def _name_columns(dataset: DatasetSpec, table: pd.DataFrame) -> pd.DataFrame:
    spec = timeline_of(dataset)
    rename = {spec.readings.entity: dataset.entity or spec.readings.entity,
              spec.readings.time: dataset.time or spec.readings.time}
    table = table.rename(columns=rename)
    entity, time = rename[spec.readings.entity], rename[spec.readings.time]
    when = table[time]
    text = when.dt.strftime("%Y-%m-%dT%H:%M:%S") if spec.clock == "time" else when.astype(str)
    table.insert(0, dataset.id, (table[entity].astype(str) + "@" + text).astype("string"))
    return table


def _cadence(
    spec: TimelineSpec, clock: Clock, codes: np.ndarray, times: np.ndarray, start: np.ndarray,
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
        offset = (hours * 3600 + minutes * 60) * NS
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
    spec: TimelineSpec, clock: Clock, codes: np.ndarray, times: np.ndarray,
    frame: pd.DataFrame, start: np.ndarray, snap_codes: np.ndarray, snap_times: np.ndarray,
    origin: np.ndarray,
) -> tuple[dict[str, np.ndarray], dict[int, int]]:
    """The window aggregates, and per window how many snapshots its coverage rules blanked.

    ``origin``: each entity's first reading time, which coverage counts from."""
    hi = rank(codes, times, snap_codes, snap_times, inclusive=True)
    first = start[snap_codes]
    elapsed = (times - times[start[codes]]).astype(np.float64) / clock.per_unit
    out: dict[str, np.ndarray] = {}
    features = spec.window_features()
    limits: dict[str, set[tuple[str, float]]] = {}
    for _, index, measurement, aggregation in features:
        if aggregation in ("count_above", "count_below"):
            side = aggregation.removeprefix("count_")
            limit = spec.windows[index].limit(measurement, side)
            assert limit is not None  # the spec checks every count has its limit
            limits.setdefault(measurement, set()).add((side, limit))
    used = list(dict.fromkeys(measurement for _, _, measurement, _ in features))
    prefix = Prefix(
        codes, {m: frame[m].to_numpy(dtype=np.float64) for m in used}, elapsed, limits,
        {m for _, _, m, aggregation in features if aggregation == "slope"},
        {m for _, _, m, aggregation in features if aggregation == "std"},
    )
    # How far back each entity's readings go from the snapshot: a window reaching before the
    # first reading is partial (an entity's first days).
    history = snap_times - origin[snap_codes]
    thin: dict[int, int] = {}
    for index, window in enumerate(spec.windows):
        if window.readings is not None:
            lo = np.minimum(np.maximum(first, hi - window.readings), hi)
            covered = (hi - lo) / window.readings
        else:
            span = clock.span(window.span or 0)
            lo = np.minimum(np.maximum(rank(codes, times, snap_codes, snap_times - span, True),
                                       first), hi)
            covered = np.minimum(history / span, 1.0) if span > 0 else np.ones(hi.size)
        short = covered < window.min_coverage
        # Only aggregates the rules can blank count: a window of `last` alone loses nothing.
        blankable = bool(set(window.aggregations) - set(WHOLE_OR_NOT))
        blanked = short & (hi > lo) & blankable
        mine = [(name, measurement, aggregation)
                for name, w, measurement, aggregation in features if w == index]
        for measurement in dict.fromkeys(m for _, m, _ in mine):
            wanted = [(aggregation, window.limit(measurement, aggregation.removeprefix("count_")))
                      for _, m, aggregation in mine if m == measurement]
            values = prefix.aggregate(measurement, lo, hi, first, wanted)
            few = prefix.valid_count(measurement, lo, hi, first) < window.min_readings
            blank = short | few
            blanked |= few & (hi > lo) & blankable
            ours = [(name, aggregation) for name, m, aggregation in mine if m == measurement]
            for (name, aggregation), value in zip(ours, values, strict=True):
                out[name] = value if aggregation in WHOLE_OR_NOT else np.where(blank, np.nan,
                                                                                value)
        thin[index] = int(blanked.sum())
    return out, thin


def _since(now: np.ndarray, then: np.ndarray, found: np.ndarray, clock: Clock) -> np.ndarray:
    elapsed = (now - then).astype(np.float64) / clock.per_unit
    return np.where(found, elapsed, np.nan)


def _join_attributes(
    spec: TimelineSpec, table: pd.DataFrame, frame: pd.DataFrame | None
) -> pd.DataFrame:
    a = spec.attributes
    assert a is not None
    require_columns(frame, "attributes", [a.entity, *a.columns])
    assert frame is not None
    keys = frame[a.entity].astype(str)
    if keys.duplicated().any():
        raise DataError(f"attributes: entity {keys[keys.duplicated()].iloc[0]!r} has two rows")
    lookup = frame[list(a.columns)].set_axis(keys.to_numpy())
    joined = lookup.reindex(table[spec.readings.entity].to_numpy()).reset_index(drop=True)
    return pd.concat([table.reset_index(drop=True), joined], axis=1)
