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
A placebo effect compares the later half of the ``before`` weeks with the earlier half the
same way: far from zero, the two groups were already drifting apart before the action.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import sparse, stats

from causeline.service.effect.design import Stack

PER = 1000.0
# Columns of the per-row sums: events and days before, after, early and late before.
_PARTS = 8


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
    placebo: float
    placebo_low: float
    placebo_high: float
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
        parts = _parts(stack)
        codes, n_clusters = _cluster_codes(stack, clusters)
        self.clusters_ = n_clusters
        self.treated_clusters_ = int(np.unique(codes[stack.entity[stack.treated]]).size)
        cohorts = stack.cohort_weeks.size
        groups = 2 * cohorts
        column = (2 * stack.cohort + stack.treated)[:, None] * _PARTS + np.arange(_PARTS)
        matrix = sparse.csr_matrix(
            (parts.ravel(), (np.repeat(stack.entity, _PARTS), column.ravel())),
            shape=(stack.entities, groups * _PARTS))
        ones = np.ones((1, stack.entities))
        point = _did(_sums(matrix, ones, groups))
        rng = np.random.default_rng(self.seed)
        draws = []
        for start in range(0, self.bootstrap, 200):
            size = min(200, self.bootstrap - start)
            drawn = rng.multinomial(n_clusters, np.full(n_clusters, 1 / n_clusters), size=size)
            weights = np.concatenate([drawn, np.zeros((size, 1))], axis=1)[:, codes]
            draws.append(_did(_sums(matrix, weights, groups)))
        tails = expanded_tail(self.level, self.treated_clusters_)
        effect = np.concatenate([d["effect"] for d in draws]) if draws else np.empty(0)
        placebo = np.concatenate([d["placebo"] for d in draws]) if draws else np.empty(0)
        low, high = _percentiles(effect, tails)
        placebo_low, placebo_high = _percentiles(placebo, tails)
        self.rates_ = Rates(
            effect=float(point["effect"][0]), low=low, high=high,
            treated_before=float(point["treated_before"][0]),
            treated_after=float(point["treated_after"][0]),
            comparison_before=float(point["comparison_before"][0]),
            comparison_after=float(point["comparison_after"][0]),
            placebo=float(point["placebo"][0]), placebo_low=placebo_low,
            placebo_high=placebo_high, replicates=int(np.isfinite(effect).sum()))
        self.weekly_ = _weekly(stack, point["weights"][0])
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


def _parts(stack: Stack) -> np.ndarray:
    """Per row: events and days before, after, and in the early and late halves of before."""
    before, half = stack.window.before, stack.window.before // 2
    spans = [(0, before), (before + 1, stack.window.width), (0, half), (half, before)]
    out = np.empty((stack.entity.size, _PARTS))
    for i, (a, b) in enumerate(spans):
        out[:, 2 * i] = stack.events[:, a:b].sum(axis=1)
        out[:, 2 * i + 1] = stack.days[:, a:b].sum(axis=1)
    return out


def _sums(matrix: sparse.csr_matrix, weights: np.ndarray, groups: int) -> np.ndarray:
    """(replicates, groups, parts): the parts summed per group, entities weighted."""
    summed = np.asarray((matrix.T @ weights.T).T)
    return summed.reshape(weights.shape[0], groups, _PARTS)


def _rate(sums: np.ndarray, part: int) -> np.ndarray:
    days = sums[..., 2 * part + 1]
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(days > 0, PER * sums[..., 2 * part] / days, np.nan)


def _did(sums: np.ndarray) -> dict[str, np.ndarray]:
    treated, comparison = sums[:, 1::2, :], sums[:, 0::2, :]
    t_before, t_after = _rate(treated, 0), _rate(treated, 1)
    c_before, c_after = _rate(comparison, 0), _rate(comparison, 1)
    change = (t_after - t_before) - (c_after - c_before)
    placebo = ((_rate(treated, 3) - _rate(treated, 2))
               - (_rate(comparison, 3) - _rate(comparison, 2)))
    weights = np.where(np.isfinite(change), treated[..., 3], 0.0)
    total = weights.sum(axis=1)

    def mean(values: np.ndarray, w: np.ndarray = weights) -> np.ndarray:
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(w.sum(axis=1) > 0,
                            np.nansum(np.where(w > 0, values, 0.0) * w, axis=1) / w.sum(axis=1),
                            np.nan)

    placebo_weights = np.where(np.isfinite(placebo), weights, 0.0)
    return {"effect": np.where(total > 0, mean(change), np.nan),
            "treated_before": mean(t_before), "treated_after": mean(t_after),
            "comparison_before": mean(c_before), "comparison_after": mean(c_after),
            "placebo": mean(placebo, placebo_weights), "weights": weights}


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


def _weekly(stack: Stack, weights: np.ndarray) -> dict[str, np.ndarray]:
    """Per week of the window, the treated and comparison rates (per 1,000 entity-days)."""
    out = {}
    cohorts = stack.cohort_weeks.size
    for name, side in (("treated", True), ("comparison", False)):
        rows = stack.treated == side
        events = np.zeros((cohorts, stack.window.width))
        days = np.zeros((cohorts, stack.window.width))
        np.add.at(events, stack.cohort[rows], stack.events[rows])
        np.add.at(days, stack.cohort[rows], stack.days[rows])
        with np.errstate(invalid="ignore", divide="ignore"):
            rate = np.where(days > 0, PER * events / days, np.nan)
        w = np.where(np.isfinite(rate), weights[:, None], 0.0)
        with np.errstate(invalid="ignore", divide="ignore"):
            out[name] = np.nansum(np.nan_to_num(rate) * w, axis=0) / w.sum(axis=0)
    return out
