"""The difference-in-differences estimate on a stack, and its interval from a bootstrap over
entities.

Per cohort c (the block of one treatment week), with rates in events per 1,000 observed
entity-days over the ``before`` weeks and over the ``after`` weeks:

    effect_c = (treated after - treated before) - (comparison after - comparison before)

and the effect is their average weighted by the treated entity-days after the action, so it
estimates the average effect on the treated (ATT) per treated entity-day, under parallel
trends: without the action the treated entities' rate would have moved as the comparison's
did (Angrist & Pischke, *Mostly Harmless Econometrics*, 2009, ch. 5.2). The rates reported
beside it are averaged with the same weights, so the effect equals the after-minus-before
change of the treated minus that of the comparison as printed.

The interval resamples whole clusters with replacement (a cluster bootstrap; an entity's weeks
are correlated, and an entity can sit in several blocks, so rows are not independent: Cameron,
Gelbach & Miller 2008, REStat 90(3)) and takes the percentiles of the re-estimated effects,
widened for the number of clusters holding treated entities (:func:`expanded_tail`). A
cluster is an entity unless ``clusters`` groups entities that share shocks (the cases of one
store): then a store's entities are drawn, or left out, together.
The pre-trend checks parallel trends where the data can: the treated-minus-comparison
difference per week before the action (cohorts weighted as the effect), its least-squares
slope, carried over the weeks between the middle of the ``before`` weeks and the middle of
the ``after`` weeks. It is the part of the effect a gap that kept widening as it did before
would produce on its own (the linear pre-trend of an event study's leads; Roth 2022, AER:
Insights 4(3), on why a test of it has limited power). Its interval comes from the same
bootstrap; far from zero, the two groups were already drifting apart before the action.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse, stats

from causeline.service.effect.design import Stack, Window

PER = 1000.0


@dataclass(frozen=True)
class Rates:
    """The point estimate, its parts and its interval, in events per 1,000 entity-days."""

    effect: float
    low: float
    high: float
    treated_before: float
    treated_after: float
    comparison_before: float
    comparison_after: float
    pretrend: float
    pretrend_low: float
    pretrend_high: float
    balance: float
    replicates: int

    @property
    def relative(self) -> float:
        """The effect as a share of the treated rate the comparison predicts after."""
        expected = self.treated_after - self.effect
        return self.effect / expected if expected > 0 else float("nan")


class StackedDiD:
    """Fit on a :class:`Stack`; ``rates_`` holds the estimate and interval, ``weekly_`` the
    treated and comparison rates per week of the window (cohorts weighted as the effect),
    ``clusters_`` and ``treated_clusters_`` what the bootstrap resampled."""

    def __init__(self, bootstrap: int = 999, level: float = 0.95, seed: int = 0) -> None:
        self.bootstrap = bootstrap
        self.level = level
        self.seed = seed

    def fit(self, stack: Stack, clusters: np.ndarray | None = None) -> StackedDiD:
        """``clusters``: per entity code, a whole-number label of the cluster the bootstrap
        resamples it with (entities sharing a label are drawn together); none: each entity
        alone. ``clusters_`` and ``treated_clusters_`` count the clusters in the stack and
        those holding a treated entity."""
        codes, n_clusters = _cluster_codes(stack, clusters)
        self.clusters_ = n_clusters
        self.treated_clusters_ = int(np.unique(codes[stack.entity[stack.treated]]).size)
        groups = 2 * stack.cohort_weeks.size
        width = stack.window.width
        parts = np.concatenate([stack.events, stack.days], axis=1)
        column = (2 * stack.cohort + stack.treated)[:, None] * 2 * width + np.arange(2 * width)
        matrix = sparse.csr_matrix(
            (parts.ravel(), (np.repeat(stack.entity, 2 * width), column.ravel())),
            shape=(stack.entities, groups * 2 * width))
        ones = np.ones((1, stack.entities))
        point = _did(_sums(matrix, ones, groups, width), stack.window, weekly_rates=True)
        rng = np.random.default_rng(self.seed)
        draws = []
        for start in range(0, self.bootstrap, 200):
            size = min(200, self.bootstrap - start)
            drawn = rng.multinomial(n_clusters, np.full(n_clusters, 1 / n_clusters), size=size)
            weights = np.concatenate([drawn, np.zeros((size, 1))], axis=1)[:, codes]
            draws.append(_did(_sums(matrix, weights, groups, width), stack.window))
        tails = expanded_tail(self.level, self.treated_clusters_)

        def interval(name: str) -> tuple[np.ndarray, float, float]:
            values = np.concatenate([d[name] for d in draws]) if draws else np.empty(0)
            return (values, *_percentiles(values, tails))

        effect, low, high = interval("effect")
        _, pretrend_low, pretrend_high = interval("pretrend")
        self.rates_ = Rates(
            effect=float(point["effect"][0]), low=low, high=high,
            treated_before=float(point["treated_before"][0]),
            treated_after=float(point["treated_after"][0]),
            comparison_before=float(point["comparison_before"][0]),
            comparison_after=float(point["comparison_after"][0]),
            pretrend=float(point["pretrend"][0]), pretrend_low=pretrend_low,
            pretrend_high=pretrend_high, balance=balance(stack, point["weights"][0]),
            replicates=int(np.isfinite(effect).sum()))
        self.weekly_ = {"treated": point["treated_weekly"][0],
                        "comparison": point["comparison_weekly"][0]}
        return self


def _cluster_codes(stack: Stack, clusters: np.ndarray | None) -> tuple[np.ndarray, int]:
    """Per entity code, its cluster numbered 0..k-1 among the clusters with a row in the
    stack (entities without one get k, a cluster never drawn), and k."""
    own = np.arange(stack.entities) if clusters is None else \
        np.asarray(clusters, dtype=np.int64)[:stack.entities]
    present = np.zeros(stack.entities, dtype=bool)
    present[stack.entity] = True
    kept, codes = np.unique(own[present], return_inverse=True)
    out = np.full(stack.entities + 1, kept.size, dtype=np.int64)
    out[:-1][present] = codes
    return out[:-1], int(kept.size)


def _sums(matrix: sparse.csr_matrix, weights: np.ndarray, groups: int, width: int
          ) -> np.ndarray:
    """(replicates, groups, 2, width): events and observed days per group and week of the
    window, entities weighted."""
    summed = np.asarray((matrix.T @ weights.T).T)
    return summed.reshape(weights.shape[0], groups, 2, width)


def _rate(sums: np.ndarray, weeks: slice) -> np.ndarray:
    """Events per 1,000 observed entity-days over ``weeks`` (NaN without an observed day)."""
    events, days = sums[..., 0, weeks].sum(axis=-1), sums[..., 1, weeks].sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(days > 0, PER * events / days, np.nan)


def _did(sums: np.ndarray, window: Window, weekly_rates: bool = False
         ) -> dict[str, np.ndarray]:
    """The estimate per replicate; ``weekly_rates`` adds the pooled rates per week (the
    plot's, wanted for the point estimate only, not for every bootstrap replicate)."""
    treated, comparison = sums[:, 1::2], sums[:, 0::2]
    before, after = slice(0, window.before), slice(window.before + 1, window.width)
    t_before, t_after = _rate(treated, before), _rate(treated, after)
    c_before, c_after = _rate(comparison, before), _rate(comparison, after)
    change = (t_after - t_before) - (c_after - c_before)
    weights = np.where(np.isfinite(change), treated[..., 1, after].sum(axis=-1), 0.0)
    total = weights.sum(axis=1)

    def mean(values: np.ndarray, w: np.ndarray = weights) -> np.ndarray:
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(w.sum(axis=1) > 0,
                            np.nansum(np.where(w > 0, values, 0.0) * w, axis=1) / w.sum(axis=1),
                            np.nan)

    with np.errstate(invalid="ignore", divide="ignore"):
        weekly = PER * sums[..., 0, :] / sums[..., 1, :]  # (replicates, groups, weeks)

    def by_week(rates: np.ndarray) -> np.ndarray:
        """(replicates, weeks): per week, the cohorts' rates weighted as the effect."""
        return np.stack([mean(rates[..., w], np.where(np.isfinite(rates[..., w]), weights, 0.0))
                         for w in range(rates.shape[-1])], axis=1)

    gaps = by_week(weekly[:, 1::2, :window.before] - weekly[:, 0::2, :window.before])
    out = {"effect": np.where(total > 0, mean(change), np.nan),
           "treated_before": mean(t_before), "treated_after": mean(t_after),
           "comparison_before": mean(c_before), "comparison_after": mean(c_after),
           "pretrend": _slope(gaps) * ((window.before + window.after) / 2 + 1),
           "weights": weights}
    if weekly_rates:
        out["treated_weekly"] = by_week(weekly[:, 1::2])
        out["comparison_weekly"] = by_week(weekly[:, 0::2])
    return out


def _slope(gaps: np.ndarray) -> np.ndarray:
    """Per replicate, the least-squares slope of the weekly gaps over the weeks that have one
    (NaN with fewer than three)."""
    weeks = np.broadcast_to(np.arange(gaps.shape[1], dtype=float), gaps.shape)
    present = np.isfinite(gaps)
    count = present.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        centre = np.where(present, weeks, 0).sum(axis=1) / count
        x = np.where(present, weeks - centre[:, None], 0.0)
        slope = (x * np.where(present, gaps, 0.0)).sum(axis=1) / (x * x).sum(axis=1)
    return np.where(count >= 3, slope, np.nan)


def balance(stack: Stack, weights: np.ndarray) -> float:
    """The standardized difference of the treated and comparison rows' rates before the
    action: the difference of their means over the square root of their variances' mean
    (each cohort's rows weighted by its share of the effect's weight). A common balance
    check of matched comparisons; above about 0.25 the groups differ enough that results
    lean on the model of the outcome (Stuart 2010, Statistical Science 25(1), a rule of
    thumb; quoted from memory)."""
    before = slice(0, stack.window.before)
    events, days = stack.events[:, before].sum(axis=1), stack.days[:, before].sum(axis=1)
    usable = days > 0
    rate = PER * events[usable] / days[usable]
    cohort, treated = stack.cohort[usable], stack.treated[usable]
    moments = []
    for side in (True, False):
        rows = treated == side
        per_cohort = np.bincount(cohort[rows], minlength=weights.size)
        w = weights[cohort[rows]] / np.maximum(per_cohort[cohort[rows]], 1)
        if w.sum() <= 0:
            return float("nan")
        average = float(np.average(rate[rows], weights=w))
        moments.append((average, float(np.average((rate[rows] - average) ** 2, weights=w))))
    (m1, v1), (m0, v0) = moments
    spread = np.sqrt((v1 + v0) / 2)
    return float((m1 - m0) / spread) if spread > 0 else 0.0


def expanded_tail(level: float, clusters: int) -> float:
    """The lower percentile (as a share) an interval at ``level`` reads off the bootstrap
    replicates when ``clusters`` clusters hold the treated entities: the "expanded percentile"
    interval (Hesterberg 2015, The American Statistician 69(4)), which corrects the plain
    percentile interval's narrowness in small samples by reading it at the normal's
    probability of sqrt(n / (n - 1)) times Student's t quantile with n - 1 degrees of freedom.
    For 60 clusters and 95 % that is the 2.2nd percentile instead of the 2.5th."""
    tail = (1 - level) / 2
    if clusters < 2:
        return tail
    t = stats.t.ppf(tail, clusters - 1)
    return float(stats.norm.cdf(np.sqrt(clusters / (clusters - 1)) * t))


def _percentiles(values: np.ndarray, tails: float) -> tuple[float, float]:
    finite = values[np.isfinite(values)]
    # Too many replicates without a single usable block: no interval rather than a narrow one.
    if finite.size == 0 or finite.size < 0.9 * values.size:
        return float("nan"), float("nan")
    low, high = np.quantile(finite, [tails, 1 - tails])
    return float(low), float(high)
