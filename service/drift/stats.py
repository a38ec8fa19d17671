"""The statistics of the drift checks: PSI, effect sizes, tests, and bootstrap intervals.

- Population stability index over fixed bins, ``sum((a - e) * ln(a / e))`` (Yurdakul 2018,
  "Statistical properties of the population stability index"); under no change,
  ``PSI / (1/n + 1/m)`` follows a chi-square law with bins - 1 degrees of freedom, which gives
  the p-value that keeps small windows from being flagged on noise.
- Cohen's h, ``2 asin(sqrt(p1)) - 2 asin(sqrt(p2))``, the effect size of a change in a share
  (Cohen 1988, ch. 6), and a two-sample z test of the same change.
- The Poisson bootstrap (Hanley & MacGibbon 2006): each event is drawn ``Poisson(1)`` times per
  replicate, so the replicates need no resampling of a million rows.
- ROC AUC as the Mann-Whitney statistic, ties counted half, with weights.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

# Shares below this count as this much in PSI: an empty bin would make it infinite. A floor of
# this size is common practice; it caps one empty bin's term at about 0.1 * ln(1000) = 0.7.
PSI_FLOOR = 1e-4
DECILES = np.linspace(0.1, 0.9, 9)


def decile_cuts(values: np.ndarray) -> np.ndarray:
    """Cut points of the deciles of the present values, repeats merged (discrete features)."""
    present = values[~np.isnan(values)]
    if present.size == 0:
        return np.empty(0)
    return np.unique(np.quantile(present, DECILES))


def bin_counts(values: np.ndarray, cuts: np.ndarray) -> np.ndarray:
    """Counts of present values per bin; bin i holds ``cuts[i-1] < x <= cuts[i]``."""
    present = values[~np.isnan(values)]
    return np.bincount(np.searchsorted(cuts, present, side="left"), minlength=cuts.size + 1)


def psi(expected: np.ndarray, actual: np.ndarray) -> float:
    """Population stability index of two share vectors over the same bins."""
    e = np.maximum(np.asarray(expected, dtype=float), PSI_FLOOR)
    a = np.maximum(np.asarray(actual, dtype=float), PSI_FLOOR)
    return float(np.sum((a - e) * np.log(a / e)))


def psi_p_value(value: float, n: int, m: int, bins: int) -> float:
    """Chance of a PSI this large with no change, ``n`` and ``m`` rows on the two sides."""
    if n == 0 or m == 0 or bins < 2:
        return 1.0
    return float(stats.chi2.sf(value / (1.0 / n + 1.0 / m), bins - 1))


def cohen_h(p: float, q: float) -> float:
    """Effect size of a share moving from ``q`` to ``p`` (signed)."""
    return float(2.0 * np.arcsin(np.sqrt(p)) - 2.0 * np.arcsin(np.sqrt(q)))


def share_p_value(p: float, n: int, q: float, m: int) -> float:
    """Two-sided two-sample z test of shares ``p`` (of ``n``) and ``q`` (of ``m``), pooled."""
    if n == 0 or m == 0:
        return 1.0
    pooled = (p * n + q * m) / (n + m)
    spread = np.sqrt(pooled * (1.0 - pooled) * (1.0 / n + 1.0 / m))
    if spread == 0.0:
        return 1.0 if p == q else 0.0
    return float(2.0 * stats.norm.sf(abs(p - q) / spread))


def mean_p_value(mean: float, sd: float, n: int, ref_mean: float, ref_sd: float, m: int) -> float:
    """Two-sided z test of two means from their spreads (Welch's statistic, large samples)."""
    if n == 0 or m == 0:
        return 1.0
    spread = np.sqrt(sd**2 / n + ref_sd**2 / m)
    if spread == 0.0:
        return 1.0 if mean == ref_mean else 0.0
    return float(2.0 * stats.norm.sf(abs(mean - ref_mean) / spread))


def cohen_d(mean: float, ref_mean: float, ref_sd: float) -> float:
    """Effect size of a mean moving, in the reference's standard deviations (signed)."""
    if ref_sd == 0.0:
        return 0.0 if mean == ref_mean else float(np.sign(mean - ref_mean) * np.inf)
    return float((mean - ref_mean) / ref_sd)


def quantile_bins(p: np.ndarray, bins: int = 10) -> np.ndarray:
    """Each event's bin of predicted probability, edges at its quantiles, as scikit-learn's
    ``calibration_curve(strategy="quantile")`` cuts them."""
    edges = np.quantile(p, np.linspace(0.0, 1.0, bins + 1))
    return np.searchsorted(edges[1:-1], p)


class RankedScores:
    """Scores and outcomes sorted once, for ROC AUC and Brier score under any weights."""

    def __init__(self, p: np.ndarray, y: np.ndarray) -> None:
        self.p = np.asarray(p, dtype=float)
        self.y = np.asarray(y, dtype=float)
        self._value, self._inverse = np.unique(self.p, return_inverse=True)

    def auc(self, weights: np.ndarray | None = None) -> float:
        w = np.ones_like(self.y) if weights is None else weights
        k = self._value.size
        pos = np.bincount(self._inverse, weights=w * self.y, minlength=k)
        neg = np.bincount(self._inverse, weights=w * (1.0 - self.y), minlength=k)
        below = np.cumsum(neg) - neg
        total = pos.sum() * neg.sum()
        return float(np.sum(pos * (below + 0.5 * neg)) / total) if total > 0 else float("nan")

    def brier(self, weights: np.ndarray | None = None) -> float:
        w = np.ones_like(self.y) if weights is None else weights
        return float(np.sum(w * (self.p - self.y) ** 2) / np.sum(w))


def _unit_codes(units: np.ndarray) -> tuple[np.ndarray, int]:
    """Each event's unit numbered 0 .. k-1, and k."""
    _, codes = np.unique(np.asarray(units), return_inverse=True)
    codes = codes.reshape(-1)
    return codes, int(codes.max(initial=-1)) + 1


@dataclass(frozen=True)
class Interval:
    estimate: float
    low: float
    high: float


BOOTSTRAP_ROWS = 200_000


def bootstrap(
    ranked: RankedScores, bins: np.ndarray, nbins: int, replicates: int = 200, seed: int = 0,
    level: float = 0.95, units: np.ndarray | None = None,
) -> tuple[Interval, Interval, list[Interval]]:
    """Percentile intervals of ROC AUC, Brier score and each bin's observed event rate.

    ``units``: per event, a whole number naming the unit it is drawn with (its entity: a
    case's events share its traits and its troubles, so they are not independent); each
    replicate draws every unit ``Poisson(1)`` times with all its events, a cluster bootstrap
    (Cameron, Gelbach & Miller 2008, REStat 90(3)). None: each event is its own unit.

    Past ``BOOTSTRAP_ROWS`` events the replicates are drawn from a random subset of the units
    holding about that many events, and their spread around the subset's estimate is scaled
    by ``sqrt(subset units / all units)`` and centred on the estimate from every event (the
    spread of these smooth statistics shrinks as one over the square root of the count)."""
    rng = np.random.default_rng(seed)
    full, full_bins = ranked, bins
    scale = 1.0
    size = ranked.y.size
    # Per event its unit's number; None: each event its own unit, the weights as drawn.
    codes, count = (None, size) if units is None else _unit_codes(units)
    if size > BOOTSTRAP_ROWS:
        if codes is None:
            subset = rng.choice(size, BOOTSTRAP_ROWS, replace=False)
            kept = BOOTSTRAP_ROWS
        else:
            kept = max(1, int(np.ceil(count * BOOTSTRAP_ROWS / size)))
            chosen = np.zeros(count, dtype=bool)
            chosen[rng.choice(count, kept, replace=False)] = True
            subset = np.flatnonzero(chosen[codes])
            codes, kept = _unit_codes(codes[subset])
        scale = float(np.sqrt(kept / count))
        count = kept
        ranked, bins = RankedScores(ranked.p[subset], ranked.y[subset]), bins[subset]
    aucs, briers = np.empty(replicates), np.empty(replicates)
    rates = np.empty((replicates, nbins))
    for r in range(replicates):
        drawn = rng.poisson(1.0, count).astype(float)
        w = drawn if codes is None else drawn[codes]
        aucs[r], briers[r] = ranked.auc(w), ranked.brier(w)
        events = np.bincount(bins, weights=w * ranked.y, minlength=nbins)
        counts = np.bincount(bins, weights=w, minlength=nbins)
        with np.errstate(invalid="ignore", divide="ignore"):
            rates[r] = events / counts
    tail = 100.0 * (1.0 - level) / 2.0

    def interval(estimate: float, centre: float, draws: np.ndarray) -> Interval:
        draws = draws[~np.isnan(draws)]
        if draws.size == 0:
            return Interval(estimate, float("nan"), float("nan"))
        low, high = np.percentile(draws, [tail, 100.0 - tail])
        return Interval(estimate, float(estimate + (low - centre) * scale),
                        float(estimate + (high - centre) * scale))

    def observed(scores: RankedScores, where: np.ndarray) -> np.ndarray:
        return np.bincount(where, weights=scores.y, minlength=nbins) / np.maximum(
            np.bincount(where, minlength=nbins), 1)

    rate, rate_subset = observed(full, full_bins), observed(ranked, bins)
    return (
        interval(full.auc(), ranked.auc(), aucs),
        interval(full.brier(), ranked.brier(), briers),
        [interval(float(rate[b]), float(rate_subset[b]), rates[:, b]) for b in range(nbins)],
    )
