"""Horizon labels and event-history features for snapshots, from sorted failure and action logs.

The rules (also in the README of the ``timeline:`` section):

- positive: a failure of a chosen type falls in ``(t, t + horizon]``;
- down (see :func:`down_reasons`): after its latest failure f <= t the entity is down at least
  while ``t - f <= after_failure`` (so a snapshot at the failure itself always is), then until
  its readings resume or a repair of a kind in ``until_action`` is logged, whichever is first,
  and never longer than ``max``; with ``stale_after``, also whenever its latest reading is older
  than that. Down snapshots are excluded;
- censored: no failure in the horizon and ``t + horizon`` is after the end of observation (the
  entity's last reading or last failure, whichever is later); excluded unless
  ``censored: negative`` is asked for;
- negative: otherwise.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from causeline.service.features.windows import rank

POSITIVE, NEGATIVE, CENSORED, DOWN = "positive", "negative", "censored", "down"


@dataclass(frozen=True)
class EventLog:
    """One log's rows sorted by (entity code, time)."""

    codes: np.ndarray
    times: np.ndarray

    def _row(self, codes: np.ndarray, position: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The time at each ``position`` and whether that row exists and is the query's entity."""
        if self.codes.size == 0:
            return np.zeros(codes.size, self.times.dtype), np.zeros(codes.size, dtype=bool)
        safe = np.clip(position, 0, self.codes.size - 1)
        found = (position >= 0) & (position < self.codes.size) & (self.codes[safe] == codes)
        return self.times[safe], found

    def latest(self, codes: np.ndarray, times: np.ndarray, inclusive: bool = True
               ) -> tuple[np.ndarray, np.ndarray]:
        """Each query's latest row at (or, not inclusive, strictly before) its time, if any."""
        return self._row(codes, rank(self.codes, self.times, codes, times, inclusive) - 1)

    def next_after(self, codes: np.ndarray, times: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Each query's first row strictly after its time, if any."""
        return self._row(codes, rank(self.codes, self.times, codes, times, inclusive=True))

    def count_through(self, codes: np.ndarray, times: np.ndarray) -> np.ndarray:
        """Rows of the same entity at or before each query's time."""
        through = rank(self.codes, self.times, codes, times, inclusive=True)
        return through - np.searchsorted(self.codes, codes, side="left")


AFTER_FAILURE = "after failure"
WAITING = "until readings resume or a repair"
STALE = "readings missing"
DOWN_REASONS = (AFTER_FAILURE, WAITING, STALE)


@dataclass(frozen=True)
class DownSpans:
    """One down rule in clock units: minimum, cap (inf: none), and what ends it."""

    after: float
    cap: float
    until_readings: bool
    repairs: EventLog | None


def down_reasons(
    codes: np.ndarray,
    times: np.ndarray,
    failures: EventLog,
    failure_rule: np.ndarray,
    rules: list[DownSpans],
    readings: EventLog,
    stale: float | None,
) -> np.ndarray:
    """Per snapshot, why it is down (one of :data:`DOWN_REASONS`), or "" when it is not.

    ``failure_rule`` gives, per failure row, the index of its rule in ``rules``.
    """
    position = rank(failures.codes, failures.times, codes, times, inclusive=True) - 1
    failed_at, has_failure = failures._row(codes, position)
    rule = np.where(has_failure, failure_rule[np.clip(position, 0, None)]
                    if failure_rule.size else 0, 0)
    after = np.array([r.after for r in rules])[rule]
    cap = np.array([r.cap for r in rules])[rule]
    by_readings = np.array([r.until_readings for r in rules])[rule]
    elapsed = (times - failed_at).astype(np.float64)
    minimum = has_failure & (elapsed <= after)
    resumed_at, resumes = readings.next_after(codes, failed_at)
    ended = by_readings & resumes & (resumed_at <= times)
    ends = by_readings.copy()
    for index, spans in enumerate(rules):
        if spans.repairs is None:
            continue
        mine = rule == index
        # The first repair at or after the failure; snapshots strictly after it count again.
        repaired_at, repaired = spans.repairs._row(
            codes, rank(spans.repairs.codes, spans.repairs.times, codes, failed_at, False))
        ended |= mine & repaired & (repaired_at < times)
        ends |= mine
    waiting = has_failure & ends & ~ended & (elapsed < cap)
    reasons = np.full(codes.size, "", dtype=object)
    if stale is not None:
        last, seen = readings.latest(codes, times)
        reasons[seen & ((times - last).astype(np.float64) > stale)] = STALE
    reasons[waiting] = WAITING
    reasons[minimum] = AFTER_FAILURE
    return reasons


def label_status(
    codes: np.ndarray,
    times: np.ndarray,
    failures: EventLog,
    horizon: float,
    down: np.ndarray,
    observed_until: np.ndarray,
) -> np.ndarray:
    """Each snapshot's status: positive, negative, censored or down (see the module docstring).

    ``down`` marks the snapshots :func:`down_reasons` found down; ``observed_until`` is each
    snapshot's entity's end of observation.
    """
    upcoming, has_next = failures.next_after(codes, times)
    positive = has_next & (upcoming <= times + horizon)
    censored = ~positive & (times + horizon > observed_until)
    status = np.full(codes.size, NEGATIVE, dtype=object)
    status[censored] = CENSORED
    status[positive] = POSITIVE
    status[down] = DOWN
    return status
