"""Horizon labels and event-history features for snapshots, from sorted failure and action logs.

The rules (also in the README of the ``timeline:`` section):

- positive: a failure of a chosen type falls in ``(t, t + horizon]``;
- down: the entity failed at f <= t and ``t - f <= down.after_failure`` (so a snapshot at the
  failure itself is always down), or, with ``down.until_action``, no such action has been logged
  in ``[f, t)`` yet; down snapshots are excluded;
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


def label_status(
    codes: np.ndarray,
    times: np.ndarray,
    failures: EventLog,
    repairs: EventLog | None,
    horizon: float,
    down_after: float,
    observed_until: np.ndarray,
) -> np.ndarray:
    """Each snapshot's status: positive, negative, censored or down (see the module docstring).

    ``observed_until`` is each snapshot's entity's end of observation.
    """
    upcoming, has_next = failures.next_after(codes, times)
    positive = has_next & (upcoming <= times + horizon)
    previous, has_previous = failures.latest(codes, times)
    down = has_previous & (times - previous <= down_after)
    if repairs is not None:
        repaired_at, has_repair = repairs.latest(codes, times, inclusive=False)
        down |= has_previous & ~(has_repair & (repaired_at >= previous))
    censored = ~positive & (times + horizon > observed_until)
    status = np.full(codes.size, NEGATIVE, dtype=object)
    status[censored] = CENSORED
    status[positive] = POSITIVE
    status[down] = DOWN
    return status
