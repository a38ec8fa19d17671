"""Exactness of contributions against outside definitions.

- Brute force from the definition of the Shapley value (Shapley 1953), with the value of a
  coalition S taken as the tree's conditional expectation given x_S, computed by the recursive
  EXPVALUE procedure of Lundberg, Erion & Lee 2018 ("Consistent individualized feature attribution
  for tree ensembles", algorithm 1): a split on a feature in S follows x, any other split averages
  its children weighted by their training cover.
- shap.TreeExplainer's own TreeSHAP implementation (the `shap` library), run on the same model.
- Local accuracy (Lundberg & Lee 2017, property 1): base value + contributions = raw score.
"""

from __future__ import annotations

import itertools
import math

import lightgbm as lgb
import numpy as np
import pytest
import shap

from causeline.service.explain.explainer import Explainer
from causeline.service.explain.score import raw_score
from causeline.service.explain.treeshap import contributions

SEEDS = [0, 1, 2]


def _goes_left(node: dict, value: float) -> bool:
    """LightGBM's own routing rule for one split (numerical and categorical decisions)."""
    missing = node["missing_type"]
    if node["decision_type"] == "==":
        if math.isnan(value):
            return False
        categories = {int(c) for c in str(node["threshold"]).split("||")}
        return int(value) >= 0 and int(value) in categories
    if math.isnan(value) and missing != "NaN":
        value = 0.0
    if (missing == "Zero" and value == 0.0) or (missing == "NaN" and math.isnan(value)):
        return bool(node["default_left"])
    return value <= node["threshold"]


def _cover(node: dict) -> float:
    return float(node["leaf_count"] if "leaf_value" in node else node["internal_count"])


def _expected_value(node: dict, x: np.ndarray, known: frozenset[int]) -> float:
    if "leaf_value" in node:
        return float(node["leaf_value"])
    left, right = node["left_child"], node["right_child"]
    if node["split_feature"] in known:
        child = left if _goes_left(node, float(x[node["split_feature"]])) else right
        return _expected_value(child, x, known)
    total = _cover(left) + _cover(right)
    return (
        _cover(left) * _expected_value(left, x, known)
        + _cover(right) * _expected_value(right, x, known)
    ) / total


def brute_force_shapley(booster: lgb.Booster, x: np.ndarray) -> tuple[np.ndarray, float]:
    trees = [t["tree_structure"] for t in booster.dump_model()["tree_info"]]
    m = x.size

    def value(coalition: frozenset[int]) -> float:
        return sum(_expected_value(tree, x, coalition) for tree in trees)

    phi = np.zeros(m)
    for i in range(m):
        others = [j for j in range(m) if j != i]
        for size in range(m):
            weight = math.factorial(size) * math.factorial(m - size - 1) / math.factorial(m)
            for subset in itertools.combinations(others, size):
                s = frozenset(subset)
                phi[i] += weight * (value(s | {i}) - value(s))
    return phi, value(frozenset())


def _small_model(seed: int, categorical: bool) -> tuple[lgb.Booster, np.ndarray]:
    rng = np.random.default_rng(seed)
    n, m = 1500, 5
    x = rng.normal(size=(n, m))
    x[rng.random((n, m)) < 0.15] = np.nan  # missing values take LightGBM's default branches
    if categorical:
        x[:, 4] = rng.integers(0, 6, n).astype(float)
    signal = np.nan_to_num(x[:, 0]) - np.nan_to_num(x[:, 1]) ** 2 + np.isnan(x[:, 2])
    if categorical:
        signal = signal + np.isin(x[:, 4], [1, 4]) * 1.5
    y = (signal + rng.normal(scale=0.7, size=n) > 0.3).astype(int)
    params = {"objective": "binary", "num_leaves": 7, "min_child_samples": 10,
              "verbosity": -1, "seed": seed, "max_cat_to_onehot": 2}
    data = lgb.Dataset(x, y, categorical_feature=[4] if categorical else [])
    return lgb.train(params, data, num_boost_round=12), x


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("categorical", [False, True])
def test_contributions_equal_brute_force_shapley(seed: int, categorical: bool) -> None:
    booster, x = _small_model(seed, categorical)
    rows = x[:25]
    ours = contributions(booster, rows)
    for row in range(rows.shape[0]):
        phi, base = brute_force_shapley(booster, rows[row])
        np.testing.assert_allclose(ours.values[row], phi, atol=1e-9, rtol=0)
        assert abs(ours.base_value - base) < 1e-9


@pytest.mark.parametrize("seed", SEEDS)
def test_shap_tree_explainer_own_algorithm_agrees(seed: int) -> None:
    booster, x = _small_model(seed, categorical=False)
    explainer = shap.TreeExplainer(booster)
    # shap hands LightGBM models to LightGBM's own code by default; "internal" makes it run its
    # own TreeSHAP on the parsed trees, which makes this an independent check.
    explainer.model.model_type = "internal"
    reference = explainer.shap_values(x, check_additivity=False)
    ours = contributions(booster, x)
    np.testing.assert_allclose(ours.values, reference, atol=1e-6, rtol=0)
    assert abs(ours.base_value - float(np.ravel(explainer.expected_value)[0])) < 1e-6


def test_bundle_model_agrees_with_shap(ai4i_bundle, ai4i_table) -> None:
    x = ai4i_bundle.builder.transform(ai4i_table).values[:3000]
    reference = shap.TreeExplainer(ai4i_bundle.booster).shap_values(x)
    ours = contributions(ai4i_bundle.booster, x)
    np.testing.assert_allclose(ours.values, reference, atol=1e-6, rtol=0)


def test_bundle_model_numeric_splits_agree_with_shap_own_algorithm(ai4i_bundle, ai4i_table):
    # shap's own parser reads LightGBM's multi-category splits inexactly, so the bundle's model is
    # checked against shap's algorithm on rows whose categorical value is missing, where every
    # categorical split takes the same (right) branch in both.
    x = ai4i_bundle.builder.transform(ai4i_table).values[:2000].copy()
    names = ai4i_bundle.spec.feature_names
    x[:, names.index("product_type")] = np.nan
    explainer = shap.TreeExplainer(ai4i_bundle.booster)
    explainer.model.model_type = "internal"
    reference = explainer.shap_values(x, check_additivity=False)
    ours = contributions(ai4i_bundle.booster, x)
    np.testing.assert_allclose(ours.values, reference, atol=1e-6, rtol=0)


def test_local_accuracy_on_every_row(ai4i_bundle, ai4i_table) -> None:
    matrix = ai4i_bundle.builder.transform(ai4i_table)
    ours = contributions(ai4i_bundle.booster, matrix.values)
    np.testing.assert_allclose(ours.raw, raw_score(ai4i_bundle, matrix.values), atol=1e-9, rtol=0)


def test_reason_codes_sum_their_features_exactly(ai4i_bundle, ai4i_table) -> None:
    # SHAP values are additive (Lundberg & Lee 2017), so a code over several features is exactly
    # their sum; a high/low pair splits that sum between them by the event's value.
    explainer = Explainer(ai4i_bundle)
    explanation = explainer.explain(ai4i_table)
    names = ai4i_bundle.spec.feature_names
    phi = explanation.contributions.values
    code = explanation.code_contributions
    index = explainer.catalogue.index

    def features(*wanted: str) -> np.ndarray:
        return phi[:, [names.index(w) for w in wanted]].sum(axis=1)

    np.testing.assert_allclose(
        code[:, index["AMBIENT"]], features("air_temp_k", "process_temp_k"), atol=1e-12
    )
    np.testing.assert_allclose(
        code[:, index["POWER_OUT_OF_BAND"]], features("power_w", "torque_nm"), atol=1e-12
    )
    speed = explanation.features.values[:, names.index("speed_rpm")]
    typical = ai4i_bundle.manifest.stats["speed_rpm"].typical
    off_typical = speed != typical
    np.testing.assert_allclose(
        (code[:, index["SPEED_LOW"]] + code[:, index["SPEED_HIGH"]])[off_typical],
        features("speed_rpm")[off_typical],
        atol=1e-12,
    )
    assert np.all(code[speed > typical, index["SPEED_LOW"]] == 0.0)
    assert np.all(code[speed < typical, index["SPEED_HIGH"]] == 0.0)
