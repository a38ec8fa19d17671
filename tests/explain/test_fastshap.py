"""The compiled TreeSHAP explainer against outside references.

- shap.TreeExplainer's own TreeSHAP (Lundberg, Erion & Lee 2018, algorithm 2, in the `shap`
  library) on random numerical models: shallow and deep trees, missing values, zeros, many
  features, features split on repeatedly along one path.
- LightGBM's ``pred_contrib=True`` (its own TreeSHAP, independent of this code) on random
  categorical models: shap's parser reads LightGBM's multi-category splits inexactly, LightGBM
  reads its own models exactly.
- Local accuracy (Lundberg & Lee 2017, property 1): base value + contributions = raw score.
"""

from __future__ import annotations

import warnings

import lightgbm as lgb
import numpy as np
import pytest
import shap
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from causeline.service.explain.fastshap import FallbackWarning, FastTreeExplainer, supports
from causeline.service.explain.treeshap import contributions

TOLERANCE = 1e-9
SETTINGS = settings(
    max_examples=30, deadline=None, suppress_health_check=[HealthCheck.too_slow], derandomize=True
)


def _numerical_data(seed: int, features: int, rows: int, missing: float) -> tuple:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(rows, features))
    x[rng.random(x.shape) < 0.1] = 0.0  # exact zeros meet missing_type "Zero"
    x[rng.random(x.shape) < missing] = np.nan
    clean = np.nan_to_num(x)
    # A few features carry the signal, and non-monotone terms make trees split on the same
    # feature again and again along one path.
    signal = np.sin(2 * clean[:, 0]) + clean[:, 1 % features] ** 2 - np.isnan(x[:, -1])
    y = (signal + rng.normal(scale=0.5, size=rows) > 0.5).astype(int)
    return x, y


def _probe_rows(x: np.ndarray, seed: int) -> np.ndarray:
    """Training rows plus new rows with NaN, exact zeros and values far outside the range."""
    rng = np.random.default_rng(seed + 1)
    fresh = rng.normal(scale=3.0, size=(60, x.shape[1]))
    fresh[rng.random(fresh.shape) < 0.2] = np.nan
    fresh[rng.random(fresh.shape) < 0.2] = 0.0
    return np.vstack([x[:60], fresh])


def _shap_own_algorithm(booster: lgb.Booster, rows: np.ndarray) -> tuple[np.ndarray, float]:
    explainer = shap.TreeExplainer(booster)
    # shap hands LightGBM models to LightGBM's own code by default; "internal" makes it run its
    # own TreeSHAP on the parsed trees, an implementation independent of both.
    explainer.model.model_type = "internal"
    values = explainer.shap_values(rows, check_additivity=False)
    return np.asarray(values), float(np.ravel(explainer.expected_value)[0])


def _rows_shap_reads_exactly(booster: lgb.Booster, rows: np.ndarray) -> np.ndarray:
    """Rows that meet no split where shap's parser of LightGBM's dump departs from LightGBM.

    LightGBM reads NaN as zero at a split whose missing type is "None", and sends zero the default
    way at a split whose missing type is "Zero"; shap's parser sends NaN the default way and zero
    by the threshold. Such rows are checked against pred_contrib only.
    """
    none_type: set[int] = set()
    zero_type: set[int] = set()

    def walk(node: dict) -> None:
        if "leaf_value" in node:
            return
        kind = node["missing_type"]
        (none_type if kind == "None" else zero_type if kind == "Zero" else set()).add(
            node["split_feature"]
        )
        walk(node["left_child"])
        walk(node["right_child"])

    for tree in booster.dump_model()["tree_info"]:
        walk(tree["tree_structure"])
    keep = np.ones(rows.shape[0], dtype=bool)
    for feature in none_type:
        keep &= ~np.isnan(rows[:, feature])
    for feature in zero_type:
        keep &= ~np.isnan(rows[:, feature]) & (rows[:, feature] != 0.0)
    return keep


def _has_repeated_feature(booster: lgb.Booster) -> bool:
    """Whether some root-to-leaf path splits twice on one feature (read from LightGBM's dump)."""

    def walk(node: dict, seen: frozenset[int]) -> bool:
        if "leaf_value" in node:
            return False
        feature = node["split_feature"]
        if feature in seen:
            return True
        below = seen | {feature}
        return walk(node["left_child"], below) or walk(node["right_child"], below)

    return any(walk(t["tree_structure"], frozenset()) for t in booster.dump_model()["tree_info"])


@SETTINGS
@given(
    seed=st.integers(0, 10_000),
    features=st.sampled_from([1, 2, 5, 60]),
    leaves=st.integers(2, 63),
    rounds=st.integers(1, 12),
    missing=st.sampled_from([0.0, 0.15, 0.5]),
    use_missing=st.booleans(),
)
def test_equals_shap_tree_explainer_on_random_numerical_models(
    seed: int, features: int, leaves: int, rounds: int, missing: float, use_missing: bool
) -> None:
    x, y = _numerical_data(seed, features, 400, missing)
    params = {
        "objective": "binary",
        "num_leaves": leaves,
        "max_depth": -1,
        "min_data_in_leaf": 3,
        "min_sum_hessian_in_leaf": 0.0,
        "learning_rate": 0.3,
        "use_missing": use_missing,
        "zero_as_missing": seed % 3 == 0,
        "verbosity": -1,
        "seed": seed,
    }
    booster = lgb.train(params, lgb.Dataset(x, y), num_boost_round=rounds)
    rows = _probe_rows(x, seed)
    ours = FastTreeExplainer(booster).contributions(rows)
    # LightGBM's own TreeSHAP (pred_contrib) on every row.
    lightgbm_values = booster.predict(rows, pred_contrib=True)
    np.testing.assert_allclose(ours.values, lightgbm_values[:, :-1], atol=TOLERANCE, rtol=0)
    # shap.TreeExplainer, own algorithm (Lundberg, Erion & Lee 2018), on the rows it reads as
    # LightGBM does, and on all rows with missing values and zeros replaced.
    exact = _rows_shap_reads_exactly(booster, rows)
    filled = np.where(np.isnan(rows) | (rows == 0.0), 0.123, rows)
    checked = np.vstack([rows[exact], filled])
    reference, base = _shap_own_algorithm(booster, checked)
    mine = FastTreeExplainer(booster).contributions(checked)
    np.testing.assert_allclose(mine.values, reference, atol=TOLERANCE, rtol=0)
    assert abs(ours.base_value - base) < TOLERANCE
    # Local accuracy (Lundberg & Lee 2017) against LightGBM's raw prediction.
    raw = booster.predict(rows, raw_score=True)
    np.testing.assert_allclose(ours.raw, raw, atol=TOLERANCE, rtol=0)


@SETTINGS
@given(
    seed=st.integers(0, 10_000),
    leaves=st.integers(2, 63),
    rounds=st.integers(1, 10),
    categories=st.sampled_from([3, 12, 40, 70]),
    onehot=st.sampled_from([1, 4]),
)
def test_equals_lightgbm_pred_contrib_on_random_categorical_models(
    seed: int, leaves: int, rounds: int, categories: int, onehot: int
) -> None:
    rng = np.random.default_rng(seed)
    rows = 600
    x = rng.normal(size=(rows, 6))
    x[:, 0] = rng.integers(0, categories, rows)
    x[:, 3] = rng.integers(0, 5, rows)
    x[rng.random(rows) < 0.1, 0] = np.nan
    effect = rng.normal(size=categories)
    signal = effect[np.nan_to_num(x[:, 0], nan=0).astype(int)] + x[:, 1] + (x[:, 3] == 2)
    y = (signal + rng.normal(scale=0.5, size=rows) > 0.3).astype(int)
    params = {
        "objective": "binary",
        "num_leaves": leaves,
        "min_data_in_leaf": 3,
        "min_data_per_group": 3,
        "cat_smooth": 1.0,
        "cat_l2": 1.0,
        "max_cat_to_onehot": onehot,
        "learning_rate": 0.3,
        "verbosity": -1,
        "seed": seed,
    }
    booster = lgb.train(params, lgb.Dataset(x, y, categorical_feature=[0, 3]), rounds)
    probe = np.vstack([x[:80], rng.normal(size=(40, 6))])
    # Categories LightGBM sends right (NaN, negative, unseen, past 2^31) and one it truncates
    # (-0.5 reads as category 0).
    probe[80:, 0] = rng.choice([np.nan, -1.0, -0.5, 2.0, 3.7, categories + 5, 1e12], 40)
    ours = FastTreeExplainer(booster).contributions(probe)
    # LightGBM's own TreeSHAP (pred_contrib), exact for its categorical splits.
    reference = booster.predict(probe, pred_contrib=True)
    np.testing.assert_allclose(ours.values, reference[:, :-1], atol=TOLERANCE, rtol=0)
    np.testing.assert_allclose(ours.base_value, reference[:, -1], atol=TOLERANCE, rtol=0)
    # Local accuracy (Lundberg & Lee 2017).
    raw = booster.predict(probe, raw_score=True)
    np.testing.assert_allclose(ours.raw, raw, atol=TOLERANCE, rtol=0)


def test_random_models_do_split_repeatedly_on_one_path() -> None:
    # Guards the numerical property test: its models must exercise TreeSHAP's merging of a
    # feature that appears twice on one path (Lundberg, Erion & Lee 2018, algorithm 2).
    x, y = _numerical_data(3, 2, 400, 0.15)
    params = {"objective": "binary", "num_leaves": 31, "min_data_in_leaf": 3, "verbosity": -1}
    booster = lgb.train(params, lgb.Dataset(x, y), num_boost_round=3)
    assert _has_repeated_feature(booster)
    rows = x[:100]
    reference, _ = _shap_own_algorithm(booster, rows)
    ours = FastTreeExplainer(booster).contributions(rows)
    np.testing.assert_allclose(ours.values, reference, atol=TOLERANCE, rtol=0)


def test_single_rows_empty_input_and_stumps() -> None:
    x, y = _numerical_data(5, 5, 300, 0.1)
    params = {"objective": "binary", "num_leaves": 15, "min_data_in_leaf": 5, "verbosity": -1}
    booster = lgb.train(params, lgb.Dataset(x, y), num_boost_round=6)
    explainer = FastTreeExplainer(booster)
    # LightGBM's pred_contrib, one row at a time (the serial path).
    for row in x[:5]:
        ours = explainer.contributions(row[None, :])
        np.testing.assert_allclose(
            ours.values, booster.predict(row[None, :], pred_contrib=True)[:, :-1], atol=TOLERANCE
        )
    assert explainer.contributions(x[:0]).values.shape == (0, 5)
    with pytest.raises(ValueError, match="5 features"):
        explainer.contributions(x[:, :4])
    # A model of constant trees (no split possible) explains nothing; its base is the score.
    flat = lgb.train(
        {"objective": "binary", "min_data_in_leaf": 500, "verbosity": -1},
        lgb.Dataset(x, y),
        num_boost_round=3,
    )
    ours = FastTreeExplainer(flat).contributions(x[:3])
    assert np.all(ours.values == 0.0)
    np.testing.assert_allclose(ours.raw, flat.predict(x[:3], raw_score=True), atol=TOLERANCE)


def test_unsupported_model_falls_back_to_pred_contrib_and_warns_once() -> None:
    x, y = _numerical_data(11, 5, 400, 0.1)
    params = {"objective": "binary", "num_leaves": 31, "min_data_in_leaf": 3, "verbosity": -1}
    booster = lgb.train(params, lgb.Dataset(x, y), num_boost_round=4)
    assert supports(booster) is None
    reason = supports(booster, max_path_features=1)
    assert reason is not None and "distinct features" in reason
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        explainer = FastTreeExplainer(booster, max_path_features=1)
        first = explainer.contributions(x[:100])
        explainer.contributions(x[:100])
    fallbacks = [w for w in caught if issubclass(w.category, FallbackWarning)]
    assert len(fallbacks) == 1 and reason in str(fallbacks[0].message)
    assert explainer.engine == "lightgbm-treeshap"
    # The fallback is LightGBM's pred_contrib itself: identical numbers.
    reference = booster.predict(x[:100], pred_contrib=True)
    np.testing.assert_array_equal(first.values, reference[:, :-1])
    assert first.base_value == reference[0, -1]


def test_multiclass_and_linear_trees_are_refused_with_a_reason() -> None:
    x, y = _numerical_data(2, 4, 300, 0.0)
    three = lgb.train(
        {"objective": "multiclass", "num_class": 3, "verbosity": -1},
        lgb.Dataset(x, (y + (x[:, 2] > 0)).astype(int)),
        num_boost_round=2,
    )
    assert "trees per iteration" in (supports(three) or "")
    linear = lgb.train(
        {"objective": "binary", "linear_tree": True, "verbosity": -1},
        lgb.Dataset(x, y),
        num_boost_round=2,
    )
    assert "linear trees" in (supports(linear) or "")


def test_demo_bundle_equals_pred_contrib(demo_bundle, demo_table) -> None:
    matrix = demo_bundle.builder.transform(demo_table.iloc[::40]).values
    explainer = FastTreeExplainer(demo_bundle.booster)
    assert explainer.engine == "fast-treeshap-v2"
    ours = explainer.contributions(matrix)
    # LightGBM's pred_contrib, the engine the bundle was built with.
    reference = contributions(demo_bundle.booster, matrix)
    np.testing.assert_allclose(ours.values, reference.values, atol=TOLERANCE, rtol=0)
    assert abs(ours.base_value - reference.base_value) < TOLERANCE
