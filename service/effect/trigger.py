"""Does a kind of action follow failures? Repairs after a breakdown are not a random fix: the
weeks before them hold the breakdown, and a rate that was high by bad luck falls back on its
own afterwards (regression to the mean; Ashenfelter's dip in the programme-evaluation
literature, Ashenfelter 1978, REStat 60(1)). A before-after comparison would credit the repair
with that fall.

The share of the kind's actions that come within ``days`` after a failure of the same entity is
set beside what actions at random times would show: per action, the share of its own entity's
observed time within the weeks around it (the study's window) that lies within ``days`` after
one of the entity's failures, averaged over the actions. Local in both ways on purpose:
against the whole fleet's time, a kind given to the entities that fail most would look like
it follows failures; against the entity's whole year, so would a kind done in the season
when failures bunch. The kind counts as following failures when its share is at least
``excess`` above that and a one-sided binomial test at that average rejects chance at
``alpha`` (conservative: the count of hits is a sum of unequal Bernoulli trials, whose variance
is at most the binomial's): the project's own rule of thumb, not a published threshold.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.stats import binomtest

from causeline.service.effect.panel import Actions, EntityWeeks

DAY_S = 86_400


@dataclass(frozen=True)
class Following:
    """How much a kind's actions follow failures, and whether that is beyond chance."""

    share: float
    chance: float
    actions: int
    p_value: float
    follows: bool


def after_failures(panel: EntityWeeks, log: Actions, days: float = 7.0, excess: float = 0.2,
                   alpha: float = 0.01, around: tuple[float, float] = (42.0, 49.0)
                   ) -> Following:
    """See the module docstring. ``around``: days before and after an action that make up the
    time its chance is read over (by default the study's 6 weeks, its week and 6 weeks)."""
    if log.codes.size == 0:
        return Following(float("nan"), float("nan"), 0, 1.0, False)
    seconds = int(days * DAY_S)
    keys_f = _keys(panel, panel.failure_codes, panel.failure_times)
    keys_a = _keys(panel, log.codes, log.times)
    after = np.searchsorted(keys_f, keys_a, side="right")
    since = np.searchsorted(keys_f, keys_a - seconds, side="left")
    hit = int((after > since).sum())
    share = hit / log.codes.size
    first = _keys(panel, log.codes, panel.first_seen[log.codes])
    last = _keys(panel, log.codes, panel.last_seen[log.codes])
    low = np.maximum(keys_a - int(around[0] * DAY_S), first)
    high = np.minimum(keys_a + int(around[1] * DAY_S), last)
    covered = _Covered(panel, keys_f, seconds)
    with np.errstate(invalid="ignore", divide="ignore"):
        local = np.where(high > low, (covered(high) - covered(low)) / (high - low), 0.0)
    chance = float(local.mean())
    p_value = float(binomtest(hit, log.codes.size, min(max(chance, 1e-9), 1.0),
                              alternative="greater").pvalue)
    return Following(share, chance, int(log.codes.size), p_value,
                     bool(share >= chance + excess and p_value < alpha))


def _keys(panel: EntityWeeks, codes: np.ndarray, times: np.ndarray) -> np.ndarray:
    """Entity and time in one sortable int64: seconds from the earliest reading, per entity."""
    origin = int(panel.first_seen.min())
    seconds = (np.asarray(times, dtype=np.int64) - origin) // 1_000_000_000
    return codes.astype(np.int64) * (1 << 40) + seconds


class _Covered:
    """Seconds of the entities' time within ``seconds`` after one of their failures, counted
    from the start of the key space up to a key: each failure covers up to its entity's next
    failure or last reading, so the spans are disjoint and their running total gives the time
    covered between any two keys of one entity as a difference."""

    def __init__(self, panel: EntityWeeks, keys: np.ndarray, seconds: int) -> None:
        codes = panel.failure_codes
        last = _keys(panel, codes, panel.last_seen[codes])
        same = np.append(codes[1:] == codes[:-1], False)
        following = np.where(same, np.append(keys[1:], 0), last)
        self.start = keys
        self.length = np.clip(np.minimum(keys + seconds, np.minimum(following, last)) - keys,
                              0, None)
        self.before = np.concatenate([[0], np.cumsum(self.length)[:-1]])

    def __call__(self, key: np.ndarray) -> np.ndarray:
        if self.start.size == 0:
            return np.zeros(key.shape)
        j = np.searchsorted(self.start, key, side="right") - 1
        inside = np.clip(key - self.start[np.maximum(j, 0)], 0, self.length[np.maximum(j, 0)])
        return np.where(j >= 0, self.before[np.maximum(j, 0)] + inside, 0).astype(np.float64)
