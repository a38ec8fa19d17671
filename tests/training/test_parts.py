"""Splits, calibration and thresholds, each against an outside definition."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from sklearn.isotonic import IsotonicRegression
from sklearn.linear_model import LogisticRegression

from causeline.service.errors import ConfigError, DataError
from causeline.service.explain.score import calibrate
from causeline.service.spec.base import validate_model
from causeline.service.spec.dataset import DatasetSpec
from causeline.training.config import SplitSettings, ThresholdSettings
from causeline.training.fit import choose_threshold, fit_calibration
from causeline.training.split import split_rows


def _times(n: int, seed: int = 0) -> pd.Series:
    rng = np.random.default_rng(seed)
    stamps = pd.Timestamp("2025-01-01", tz="UTC") + pd.to_timedelta(
        rng.integers(0, 365 * 24, n), unit="h")
    return pd.Series(stamps)


def test_time_split_holds_out_the_latest_rows() -> None:
    times = _times(5000)
    split = split_rows(SplitSettings(by="time", holdout=0.2, validation=0.25),
                       np.zeros(5000), times, None, seed=0)
    assert times.iloc[split.fit].max() < times.iloc[split.valid].min()
    assert times.iloc[split.valid].max() < times.iloc[split.test].min()
    assert sorted(np.concatenate([split.fit, split.valid, split.test])) == list(range(5000))
    assert abs(split.test.size / 5000 - 0.2) < 0.02


def test_entity_split_never_shares_an_entity() -> None:
    entities = pd.Series([f"E{i % 97}" for i in range(5000)])
    split = split_rows(SplitSettings(by="entity"), np.zeros(5000), None, entities, seed=3)
    parts = [set(entities.iloc[rows]) for rows in (split.fit, split.valid, split.test)]
    assert not (parts[0] & parts[1]) and not (parts[0] & parts[2]) and not (parts[1] & parts[2])


def test_auto_split_prefers_time_then_entity() -> None:
    y = np.zeros(300)
    entities = pd.Series([f"E{i % 10}" for i in range(300)])
    assert split_rows(SplitSettings(), y, _times(300), entities, 0).method == "time"
    assert split_rows(SplitSettings(), y, None, entities, 0).method == "entity"
    assert split_rows(SplitSettings(), y, None, None, 0).method == "random"
    with pytest.raises(DataError, match="no time column"):
        split_rows(SplitSettings(by="time"), y, None, entities, 0)


def _scores(seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    raw = rng.normal(-2.0, 1.5, 4000)
    y = (rng.random(4000) < 1 / (1 + np.exp(-(0.7 * raw + 0.4)))).astype(int)
    return raw, y


def test_sigmoid_calibration_is_platt_scaling() -> None:
    # Platt (1999): a logistic regression of the label on the raw score; scikit-learn's
    # LogisticRegression is the reference implementation here.
    raw, y = _scores()
    calibration = fit_calibration("sigmoid", raw, y)
    reference = LogisticRegression(C=1e6, max_iter=1000).fit(raw.reshape(-1, 1), y)
    np.testing.assert_allclose(calibrate(calibration, raw),
                               reference.predict_proba(raw.reshape(-1, 1))[:, 1], atol=1e-9)
    # The generating slope and intercept are recovered (loosely: 4000 noisy labels).
    assert abs(calibration.slope - 0.7) < 0.15 and abs(calibration.intercept - 0.4) < 0.3


def test_isotonic_calibration_matches_scikit_learn() -> None:
    raw, y = _scores(1)
    calibration = fit_calibration("isotonic", raw, y)
    reference = IsotonicRegression(out_of_bounds="clip", y_min=0, y_max=1).fit(raw, y)
    probe = np.linspace(raw.min() - 1, raw.max() + 1, 500)
    np.testing.assert_allclose(calibrate(calibration, probe), reference.predict(probe), atol=1e-12)


@pytest.mark.parametrize("ratio", [1.0, 4.0, 19.0])
def test_cost_ratio_threshold_minimises_expected_cost(ratio: float) -> None:
    # Elkan (2001), theorem 1: with calibrated p, flag when p >= c_FP / (c_FP + c_FN).
    # Checked here by brute force on calibrated probabilities with labels drawn from them.
    rng = np.random.default_rng(7)
    p = rng.beta(0.5, 4.0, 200_000)
    y = (rng.random(p.size) < p).astype(int)
    decision = choose_threshold(ThresholdSettings(cost_ratio=ratio), p, y)
    grid = np.linspace(0.01, 0.99, 99)
    cost = [ratio * ((p < t) & (y == 1)).sum() + ((p >= t) & (y == 0)).sum() for t in grid]
    assert abs(decision.threshold - grid[int(np.argmin(cost))]) <= 0.03


def test_precision_target_threshold_is_lowest_that_meets_it() -> None:
    p = np.array([0.9, 0.8, 0.7, 0.6, 0.5, 0.4, 0.3])
    y = np.array([1, 1, 0, 1, 0, 0, 1])
    # Worked by hand: flagging the top 4 gives precision 3/4; the top 5, 3/5.
    decision = choose_threshold(ThresholdSettings(precision=0.75), p, y)
    assert decision.threshold == 0.6
    unreachable = choose_threshold(ThresholdSettings(precision=0.99), p[2:], y[2:])
    assert "not reached" in unreachable.rule


def _spec(**changes: object) -> dict:
    base = {
        "name": "t", "target": "y", "id": "id",
        "features": [
            {"name": "a", "role": "controllable"},
            {"name": "b", "role": "observable"},
            {"name": "k", "role": "observable", "kind": "categorical"},
        ],
        "reason_codes": [{"code": "A_HIGH", "features": ["a"], "text": "a is {a}"}],
    }
    base.update(changes)
    return base


@pytest.mark.parametrize(
    ("codes", "message"),
    [
        ([{"code": "X", "features": ["a"], "text": "t"},
          {"code": "Y", "features": ["a", "b"], "text": "t"}], "same features"),
        ([{"code": "X", "features": ["a"], "text": "t"},
          {"code": "Y", "features": ["a"], "text": "t"}], "distinct directions"),
        ([{"code": "X", "features": ["k"], "direction": "high", "text": "t"}], "categorical"),
        ([{"code": "X", "features": ["a"], "text": "{zz}"}], "not a feature"),
        ([{"code": "lower", "features": ["a"], "text": "t"}], "code"),
        ([{"code": "X", "features": ["a"], "text": "t",
           "fix": {"kind": "k", "action": "a", "targets": {"a": "high"}}}], "needs a number"),
    ],
)
def test_catalogue_rules_name_the_key(codes: list, message: str) -> None:
    with pytest.raises(ConfigError, match=message) as info:
        validate_model(DatasetSpec, _spec(reason_codes=codes), "config.yaml")
    assert "reason_codes" in str(info.value) or "code" in str(info.value)


def test_high_and_low_codes_may_share_a_feature() -> None:
    codes = [{"code": "A_HIGH", "features": ["a"], "direction": "high", "text": "t"},
             {"code": "A_LOW", "features": ["a"], "direction": "low", "text": "t"}]
    spec = validate_model(DatasetSpec, _spec(reason_codes=codes), "config.yaml")
    assert [c.code for c in spec.reason_codes] == ["A_HIGH", "A_LOW"]
