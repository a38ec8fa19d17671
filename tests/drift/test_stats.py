"""The drift statistics against hand computations and reference libraries."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as scipy_stats
from sklearn.calibration import calibration_curve
from sklearn.metrics import brier_score_loss, roc_auc_score

from causeline.service.drift.checks import calibration_checks
from causeline.service.drift.stats import (
    RankedScores,
    bin_counts,
    bootstrap,
    cohen_h,
    decile_cuts,
    psi,
    psi_p_value,
    quantile_bins,
)


def test_psi_matches_a_hand_computation_on_four_bins() -> None:
    # Textbook formula PSI = sum((a - e) * ln(a / e)), worked by hand on four made-up bins:
    # (0.10-0.25)ln(0.4) + (0.20-0.25)ln(0.8) + (0.30-0.25)ln(1.2) + (0.40-0.25)ln(1.6)
    # = 0.137444 + 0.011157 + 0.009116 + 0.070501 = 0.228218
    assert psi([0.25] * 4, [0.1, 0.2, 0.3, 0.4]) == pytest.approx(0.228218, abs=1e-6)
    assert psi([0.25] * 4, [0.25] * 4) == 0.0


def test_psi_is_the_symmetric_kullback_leibler_divergence() -> None:
    # PSI = KL(a || e) + KL(e || a) (Yurdakul 2018), here by scipy's entropy.
    rng = np.random.default_rng(1)
    for _ in range(20):
        e, a = rng.dirichlet(np.ones(10)), rng.dirichlet(np.ones(10))
        expected = scipy_stats.entropy(a, e) + scipy_stats.entropy(e, a)
        assert psi(e, a) == pytest.approx(expected, rel=1e-9)


def test_psi_p_values_are_uniform_under_no_change() -> None:
    # Under no change PSI / (1/n + 1/m) is chi-square with bins - 1 degrees of freedom
    # (Yurdakul 2018): about 5 % of draws fall below p = 0.05, not 0 and not half.
    rng = np.random.default_rng(2)
    reference = rng.normal(size=20_000)
    cuts = decile_cuts(reference)
    expected = bin_counts(reference, cuts) / reference.size
    small = [psi_p_value(psi(expected, bin_counts(w := rng.normal(size=800), cuts) / w.size),
                         800, reference.size, cuts.size + 1) for _ in range(400)]
    assert 0.02 <= np.mean(np.array(small) < 0.05) <= 0.09


def test_cohen_h_matches_the_arcsine_transform() -> None:
    # Cohen (1988), ch. 6: phi = 2 asin(sqrt(p)); phi(0.5) = 1.5708, phi(0.25) = 1.0472.
    assert cohen_h(0.5, 0.25) == pytest.approx(1.5708 - 1.0472, abs=1e-4)
    assert cohen_h(0.25, 0.5) == pytest.approx(-cohen_h(0.5, 0.25))


def test_auc_and_brier_agree_with_scikit_learn_with_ties_and_weights() -> None:
    rng = np.random.default_rng(3)
    y = (rng.uniform(size=3000) < 0.2).astype(float)
    p = np.round(np.clip(0.2 + 0.3 * (y - 0.2) + rng.normal(0, 0.15, y.size), 0, 1), 2)  # ties
    ranked = RankedScores(p, y)
    assert ranked.auc() == pytest.approx(roc_auc_score(y, p), abs=1e-12)
    assert ranked.brier() == pytest.approx(brier_score_loss(y, p), abs=1e-12)
    w = rng.poisson(1.0, y.size).astype(float)
    assert ranked.auc(w) == pytest.approx(roc_auc_score(y, p, sample_weight=w), abs=1e-12)
    assert ranked.brier(w) == pytest.approx(brier_score_loss(y, p, sample_weight=w), abs=1e-12)


def test_calibration_table_agrees_with_scikit_learn_calibration_curve() -> None:
    rng = np.random.default_rng(4)
    p = rng.beta(1, 8, 5000)
    y = (rng.uniform(size=p.size) < p * 1.3).astype(float)
    result = calibration_checks(p, y, {"roc_auc": 0.7, "brier": 0.08}, replicates=20)
    true, predicted = calibration_curve(y, p, n_bins=10, strategy="quantile")
    np.testing.assert_allclose(result.table["observed_rate"], true, atol=1e-12)
    np.testing.assert_allclose(result.table["mean_predicted"], predicted, atol=1e-12)
    assert np.array_equal(quantile_bins(p).max(), 9)
    ratio = next(f for f in result.findings if f.check == "observed_to_predicted")
    assert ratio.value == pytest.approx(y.mean() / p.mean())


def test_bootstrap_interval_of_auc_covers_the_binormal_value_with_its_known_spread() -> None:
    # Binormal scores, events N(1, 1) and others N(0, 1): AUC = Phi(1 / sqrt 2) = 0.7602.
    # Hanley & McNeil (1982) give its standard error; a 95 % interval is about 3.92 of them.
    rng = np.random.default_rng(5)
    n1, n0 = 1000, 3000
    p = np.concatenate([rng.normal(1, 1, n1), rng.normal(0, 1, n0)])
    y = np.concatenate([np.ones(n1), np.zeros(n0)])
    ranked = RankedScores(p, y)
    auc, _, _ = bootstrap(ranked, quantile_bins(p), 10, replicates=300, seed=6)
    a = scipy_stats.norm.cdf(1 / math.sqrt(2))
    q1, q2 = a / (2 - a), 2 * a * a / (1 + a)
    se = math.sqrt((a * (1 - a) + (n1 - 1) * (q1 - a * a) + (n0 - 1) * (q2 - a * a)) / (n1 * n0))
    assert auc.low < a < auc.high
    assert 0.7 * 3.92 * se < auc.high - auc.low < 1.3 * 3.92 * se


def test_a_large_window_bootstraps_a_subset_with_the_spread_scaled() -> None:
    # 800,000 binormal events: the scaled interval must still hold the analytic AUC and be
    # about 3.92 Hanley-McNeil standard errors wide (as above), now for n = 800,000.
    rng = np.random.default_rng(7)
    n1, n0 = 200_000, 600_000
    p = np.concatenate([rng.normal(1, 1, n1), rng.normal(0, 1, n0)])
    y = np.concatenate([np.ones(n1), np.zeros(n0)])
    auc, _, _ = bootstrap(RankedScores(p, y), quantile_bins(p), 10, replicates=100, seed=8)
    a = scipy_stats.norm.cdf(1 / math.sqrt(2))
    q1, q2 = a / (2 - a), 2 * a * a / (1 + a)
    se = math.sqrt((a * (1 - a) + (n1 - 1) * (q1 - a * a) + (n0 - 1) * (q2 - a * a)) / (n1 * n0))
    assert auc.estimate == pytest.approx(roc_auc_score(y, p), abs=1e-12)
    assert auc.low < a < auc.high
    assert 0.7 * 3.92 * se < auc.high - auc.low < 1.3 * 3.92 * se


def _ar1(rng: np.random.Generator, n: int, keep: float) -> np.ndarray:
    """A unit-variance first-order autoregression started in its stationary state."""
    from scipy.signal import lfilter

    shocks = rng.normal(0.0, math.sqrt(1 - keep**2), n)
    shocks[0] = rng.normal()
    return lfilter([1.0], [1.0, -keep], shocks)


def test_serial_factor_in_chunks_and_the_spread_of_a_mean_of_an_autoregression() -> None:
    # Over many series, the spread of the mean of n AR(1) values with keep 0.95 is that of
    # n (1 - keep) / (1 + keep) independent ones (the textbook effective sample size, from
    # memory); the batch-means factor must find it, read whole or in uneven chunks, and a
    # series of independent values must keep (nearly) all its rows.
    from causeline.service.drift.checks import Units
    from causeline.service.drift.tally import SerialTally

    rng = np.random.default_rng(8)
    n, keep = 20_000, 0.95
    means, factors = [], []
    for _ in range(100):
        series = _ar1(rng, n, keep)
        whole, chunked = SerialTally(1), SerialTally(1)
        whole.add(series[:, None])
        for start in range(0, n, 3_333):
            chunked.add(series[start:start + 3_333, None])
        assert chunked.factor()[0] == pytest.approx(whole.factor()[0], rel=1e-6)
        means.append(series.mean())
        factors.append(whole.factor()[0])
    planted = (1 - keep) / (1 + keep)
    assert np.median(factors) == pytest.approx(planted, rel=0.25)
    effective = Units(serial=True).at(float(np.median(factors))).n(n)
    assert np.std(means) == pytest.approx(1 / math.sqrt(effective), rel=0.25)
    independent = SerialTally(2)
    independent.add(rng.normal(size=(n, 2)))
    assert (independent.factor() > 0.4).all()
    assert Units(window=80).at(0.01).n(29_200) == 80  # the entities rule is left as it is


def test_one_unit_per_event_draws_as_the_event_bootstrap() -> None:
    # Units that are each one event, named in the events' order, are the event bootstrap
    # itself: same seed, same draws.
    rng = np.random.default_rng(11)
    p = rng.uniform(size=3000)
    y = (rng.uniform(size=3000) < p).astype(float)
    bins = quantile_bins(p)
    alone = bootstrap(RankedScores(p, y), bins, 10, replicates=50, seed=3)
    units = bootstrap(RankedScores(p, y), bins, 10, replicates=50, seed=3,
                      units=np.arange(3000) * 7 + 5)
    assert alone[1] == units[1] and alone[0] == units[0]


def _clustered(rng: np.random.Generator, entities: int, each: int
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Events of entities whose risk differs: the model's probability misses each entity's
    own factor, so an entity's events err together."""
    units = np.repeat(np.arange(entities), each)
    p = rng.uniform(0.02, 0.3, units.size)
    own = rng.lognormal(0.0, 0.8, entities)[units]
    y = (rng.uniform(size=units.size) < np.minimum(p * own, 1.0)).astype(float)
    return p, y, units


def test_drawing_entities_gives_the_cluster_robust_spread_of_the_brier_score() -> None:
    # The Brier score is a mean of (p - y)^2 over events; its cluster-robust variance (the
    # sandwich formula of Cameron & Miller 2015, J. Human Resources 50(2), without small-sample
    # factor) is sum over entities of (sum of their deviations)^2 / n^2. 95 % of a percentile
    # interval spans about 3.92 standard errors; drawing events alone spans far less here.
    rng = np.random.default_rng(12)
    p, y, units = _clustered(rng, 150, 40)
    d = (p - y) ** 2 - np.mean((p - y) ** 2)
    se = math.sqrt(np.sum(np.bincount(units, weights=d) ** 2)) / d.size
    naive = math.sqrt(np.sum(d ** 2)) / d.size
    bins = quantile_bins(p)
    _, brier, _ = bootstrap(RankedScores(p, y), bins, 10, replicates=400, seed=4, units=units)
    _, alone, _ = bootstrap(RankedScores(p, y), bins, 10, replicates=400, seed=4)
    assert se > 1.3 * naive  # the draw is clustered enough for the check to tell
    assert 0.8 * 3.92 * se < brier.high - brier.low < 1.2 * 3.92 * se
    assert alone.high - alone.low < 0.85 * 3.92 * se


def test_a_large_window_draws_a_subset_of_entities_with_the_spread_scaled() -> None:
    # Past the subset size the entities, not the events, are subsampled, and the spread is
    # scaled by the entities' share: the interval stays about 3.92 cluster-robust errors wide.
    rng = np.random.default_rng(13)
    p, y, units = _clustered(rng, 6000, 50)
    d = (p - y) ** 2 - np.mean((p - y) ** 2)
    se = math.sqrt(np.sum(np.bincount(units, weights=d) ** 2)) / d.size
    _, brier, _ = bootstrap(RankedScores(p, y), quantile_bins(p), 10, replicates=200, seed=5,
                            units=units)
    assert brier.estimate == pytest.approx(np.mean((p - y) ** 2), abs=1e-12)
    assert 0.75 * 3.92 * se < brier.high - brier.low < 1.25 * 3.92 * se
