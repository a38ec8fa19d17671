"""Does a kind of action follow failures? Repairs after a breakdown are not a random fix: the
weeks before them hold the breakdown, and a rate that was high by bad luck falls back on its
own afterwards (regression to the mean; Ashenfelter's dip in the programme-evaluation
literature, Ashenfelter 1978, REStat 60(1)). A before-after comparison would credit the repair
with that fall.

The share of the kind's actions that come within ``days`` after a failure of the same entity is
set beside the share of all observed time that lies within ``days`` after a failure (what
actions at random times would show). The kind counts as following failures when its share is
at least ``excess`` above that and a one-sided binomial test rejects chance at ``alpha``: the
project's own rule of thumb, not a published threshold.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.stats import binomtest

from causeline.service.effect.panel import DAY_NS, Actions, EntityWeeks


@dataclass(frozen=True)
class Following:
    """How much a kind's actions follow failures, and whether that is beyond chance."""

    share: float
    chance: float
    actions: int
    p_value: float
    follows: bool


def after_failures(panel: EntityWeeks, log: Actions, days: float = 7.0, excess: float = 0.2,
                   alpha: float = 0.01) -> Following:
    """See the module docstring."""
    span = int(days * DAY_NS)
    chance = _covered(panel, span)
    if log.codes.size == 0:
        return Following(float("nan"), chance, 0, 1.0, False)
    keys_f = _keys(panel, panel.failure_codes, panel.failure_times)
    keys_a = _keys(panel, log.codes, log.times)
    after = np.searchsorted(keys_f, keys_a, side="right")
    since = np.searchsorted(keys_f, keys_a - span // 1_000_000_000, side="left")
    hit = int((after > since).sum())
    share = hit / log.codes.size
    p_value = float(binomtest(hit, log.codes.size, min(max(chance, 1e-9), 1.0),
                              alternative="greater").pvalue)
    return Following(share, chance, int(log.codes.size), p_value,
                     bool(share >= chance + excess and p_value < alpha))


def _keys(panel: EntityWeeks, codes: np.ndarray, times: np.ndarray) -> np.ndarray:
    """Entity and time in one sortable int64: seconds from the earliest reading, per entity."""
    origin = int(panel.first_seen.min())
    seconds = (np.asarray(times, dtype=np.int64) - origin) // 1_000_000_000
    return codes.astype(np.int64) * (1 << 40) + seconds


def _covered(panel: EntityWeeks, span: int) -> float:
    """The share of the entities' observed time (first to last reading) within ``span`` after
    one of their failures."""
    # In float: a fleet's nanoseconds overflow int64 when summed.
    total = float(np.sum((panel.last_seen - panel.first_seen).astype(np.float64)))
    if total <= 0 or panel.failure_codes.size == 0:
        return 0.0
    codes, times = panel.failure_codes, panel.failure_times
    end = panel.last_seen[codes]
    nxt = np.append(times[1:], np.iinfo(np.int64).max)
    same = np.append(codes[1:] == codes[:-1], False)
    stop = np.minimum(times + span, np.where(same, np.minimum(nxt, end), end))
    start = np.maximum(times, panel.first_seen[codes])
    return float(np.clip(stop - start, 0, None).astype(np.float64).sum()) / total
