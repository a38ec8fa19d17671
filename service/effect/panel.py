"""Entity-weeks from raw logs: days observed and events per entity and calendar week, and the
actions of each kind, the units the fix-effect study counts in.

A week runs Monday to Sunday (UTC). An entity-day is observed when the entity has a reading
that day; events are the failures of the types the config predicts (all, when it names none),
counted in the week they start. Rates are events per 1,000 observed entity-days.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from causeline.service.errors import DataError
from causeline.service.features.logs import (
    Clock,
    TimelineInputs,
    event_log,
    failure_filter,
    readings_log,
    require_columns,
)
from causeline.service.spec.timeline import TimelineSpec

DAY_NS = 86_400 * 1_000_000_000
# 1970-01-01 was a Thursday: shifting by three days makes weeks start on Monday.
MONDAY_SHIFT = 3


def day_number(times: np.ndarray) -> np.ndarray:
    """Days since 1970-01-01 of int64 nanosecond times."""
    return np.floor_divide(times, DAY_NS)


def week_number(days: np.ndarray) -> np.ndarray:
    """Monday-to-Sunday weeks since the one holding 1970-01-01, from day numbers."""
    return np.floor_divide(days + MONDAY_SHIFT, 7)


@dataclass(frozen=True)
class Actions:
    """One action kind's log: entity codes, times (ns) and weeks, sorted by entity then time."""

    codes: np.ndarray
    times: np.ndarray
    weeks: np.ndarray


@dataclass(frozen=True)
class EntityWeeks:
    """Per entity (rows, ``names``) and week (columns, from ``first_week``): observed days and
    events; the failures counted, and each tracked action kind's log."""

    names: np.ndarray
    first_week: int
    days: np.ndarray  # (entities, weeks) observed days
    events: np.ndarray  # (entities, weeks) failures counted
    failure_codes: np.ndarray
    failure_times: np.ndarray
    actions: dict[str, Actions]
    first_seen: np.ndarray  # per entity, its first and last reading (ns)
    last_seen: np.ndarray

    @property
    def weeks(self) -> int:
        return int(self.days.shape[1])

    def week_start(self, week: int) -> pd.Timestamp:
        """The Monday a week column starts on."""
        day = (self.first_week + week) * 7 - MONDAY_SHIFT
        return pd.Timestamp(day * DAY_NS)


def entity_weeks(spec: TimelineSpec, inputs: TimelineInputs) -> EntityWeeks:
    """Count observed days and events per entity and week from the logs; see the module."""
    if spec.clock != "time":
        raise DataError("the fix-effect study counts events per entity-day; it needs a time "
                        "clock (timeline.clock: time), not cycles")
    clock = Clock(spec)
    readings = readings_log(spec, inputs.readings, clock)
    codes, uniques = pd.factorize(readings.frame["__entity"], sort=True)
    names = np.asarray(uniques, dtype=object)
    days = day_number(readings.times)
    observed = np.unique(codes.astype(np.int64) * (1 << 32) + (days - days.min()))
    entity = observed >> 32
    day = (observed & ((1 << 32) - 1)) + days.min()
    week = week_number(day)
    first = int(week.min())
    last = int(week.max())
    failures = event_log(spec.failures.entity, spec.failures.time, inputs.failures, "failures",
                         names, clock, failure_filter(spec))
    failure_weeks = week_number(day_number(failures.times))
    last = max(last, int(failure_weeks.max()) if failure_weeks.size else last)
    shape = (names.size, last - first + 1)
    day_counts = np.zeros(shape)
    np.add.at(day_counts, (entity, week - first), 1.0)
    events = np.zeros(shape)
    inside = failure_weeks >= first  # a failure before an entity's first reading: no week
    np.add.at(events, (failures.codes[inside], failure_weeks[inside] - first), 1.0)
    actions: dict[str, Actions] = {}
    if spec.actions is not None:
        require_columns(inputs.actions, "actions", [spec.actions.kind_column])
        log = event_log(spec.actions.entity, spec.actions.time, inputs.actions, "actions", names,
                        clock, None)
        kinds = log.frame[spec.actions.kind_column].astype("string").to_numpy()
        for kind in spec.actions.kinds:
            chosen = kinds == kind
            times = log.times[chosen]
            actions[kind] = Actions(log.codes[chosen], times,
                                    week_number(day_number(times)) - first)
    first_seen = np.full(names.size, np.iinfo(np.int64).max)
    last_seen = np.full(names.size, np.iinfo(np.int64).min)
    np.minimum.at(first_seen, codes, readings.times)
    np.maximum.at(last_seen, codes, readings.times)
    return EntityWeeks(names, first, day_counts, events, failures.codes, failures.times,
                       actions, first_seen, last_seen)
