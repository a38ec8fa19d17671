"""Explanation invariants on random models and random, hostile inputs (Hypothesis).

Each example trains a small LightGBM bundle on random data through the real training path
(``fit_bundle`` + ``write_bundle`` + ``load_bundle``) with a random feature mix, reason-code
catalogue, calibration and ``top_k``, then explains random rows that include missing values,
infinities, words in number columns, unknown categories and magnitudes up to 1e308.
"""

from __future__ import annotations

import json
import math
import tempfile
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from causeline.service.bundle.load import load_bundle
from causeline.service.explain.explainer import Explainer
from causeline.service.explain.records import explanation_records
from causeline.training.config import TrainConfig
from causeline.training.pipeline import fit_bundle, write_bundle

ROWS = 400


@st.composite
def model_specs(draw: st.DrawFn) -> dict[str, Any]:
    """A random data-set config: numeric and categorical features, maybe a derived one."""
    numeric = [f"x{i}" for i in range(draw(st.integers(1, 5)))]
    categorical = {f"k{i}": [f"c{j}" for j in range(draw(st.integers(2, 4)))]
                   for i in range(draw(st.integers(0, 2)))}
    features: list[dict[str, Any]] = [
        {"name": name, "role": draw(st.sampled_from(["controllable", "observable"]))}
        for name in numeric
    ]
    features += [{"name": name, "role": "observable", "kind": "categorical"}
                 for name in categorical]
    if len(numeric) >= 2 and draw(st.booleans()):
        op = draw(st.sampled_from(["/", "*", "-", "+"]))
        features.append({"name": "derived", "role": "observable",
                         "expr": f"{numeric[0]} {op} {numeric[1]}"})
    codes: list[dict[str, Any]] = []
    names = [f["name"] for f in features]
    rest = list(names)
    if len(rest) >= 2 and draw(st.booleans()):  # one code summing two features
        pair, rest = rest[:2], rest[2:]
        codes.append({"code": "PAIR", "features": pair, "direction": "any", "text": "pair"})
    for name in rest:
        kind = "categorical" if name in categorical else "numeric"
        choice = draw(st.sampled_from(["auto", "any"] + (["split"] if kind == "numeric" else [])))
        text = f"{name} is {{{name}}} (typical {{{name}:typical}})"
        if choice == "any":
            codes.append({"code": f"{name.upper()}_ANY", "features": [name], "direction": "any",
                          "text": text})
        elif choice == "split":
            for direction in ("high", "low"):
                codes.append({"code": f"{name.upper()}_{direction.upper()}", "features": [name],
                              "direction": direction, "text": text})
    config = {
        "name": "random-model", "target": "event", "id": "event_id",
        "features": features, "reason_codes": codes,
        "training": {
            "split": {"by": "random"}, "min_events": 5, "max_rounds": draw(st.integers(10, 30)),
            "early_stopping_rounds": 5, "seed": draw(st.integers(0, 1000)),
            "calibration": draw(st.sampled_from(["sigmoid", "isotonic"])),
            "lightgbm": {"num_leaves": draw(st.sampled_from([2, 4, 15])),
                         "min_child_samples": 5},
        },
        "explain": {"top_k": draw(st.integers(1, 6)),
                    "min_contribution": draw(st.sampled_from([0.0, 0.01, 0.05, 0.3]))},
    }
    scales = {name: draw(st.sampled_from([1e-3, 1.0, 1e6])) for name in numeric}
    return {"config": config, "categorical": categorical, "scales": scales,
            "seed": draw(st.integers(0, 2**31 - 1))}


def training_table(spec: dict[str, Any]) -> pd.DataFrame:
    """Random rows whose event depends on the features, with some values missing."""
    rng = np.random.default_rng(spec["seed"])
    columns: dict[str, Any] = {"event_id": [f"e{i}" for i in range(ROWS)]}
    signal = np.zeros(ROWS)
    for name, scale in spec["scales"].items():
        values = rng.normal(size=ROWS)
        signal += rng.normal() * values
        values = values * scale
        values[rng.random(ROWS) < 0.1] = np.nan
        columns[name] = values
    for name, categories in spec["categorical"].items():
        picks = rng.integers(0, len(categories), size=ROWS)
        signal += rng.normal(size=len(categories))[picks]
        columns[name] = [categories[p] for p in picks]
    threshold = np.quantile(signal + rng.normal(scale=0.5, size=ROWS), 0.7)
    columns["event"] = (signal + rng.normal(scale=0.5, size=ROWS) > threshold).astype(int)
    return pd.DataFrame(columns)


def number_cells() -> st.SearchStrategy[Any]:
    return st.one_of(
        st.floats(allow_nan=True, allow_infinity=True),  # subnormals to +-1.8e308, NaN, inf
        st.sampled_from([None, 0.0, -0.0, 1e308, -1e308, 5e-324, "12.5", "not a number", ""]),
    )


def inputs(spec: dict[str, Any]) -> st.SearchStrategy[pd.DataFrame]:
    cells: dict[str, st.SearchStrategy[Any]] = {name: number_cells() for name in spec["scales"]}
    for name, categories in spec["categorical"].items():
        cells[name] = st.sampled_from([*categories, "unknown", None, ""])
    rows = st.lists(st.fixed_dictionaries(cells), min_size=1, max_size=25)
    return rows.map(lambda records: pd.DataFrame(
        {**{name: pd.Series([r[name] for r in records], dtype=object) for name in cells},
         "event_id": [f"q{i}" for i in range(len(records))]}))


@settings(max_examples=40, deadline=None, derandomize=True,
          suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])
@given(spec=model_specs(), data=st.data())
def test_explanations_hold_their_invariants(spec: dict[str, Any], data: st.DataObject) -> None:
    config = TrainConfig.model_validate(spec["config"])
    manifest, model_text, reference = fit_bundle(config, training_table(spec), fingerprint="0" * 64)
    with tempfile.TemporaryDirectory() as folder:
        write_bundle(Path(folder) / "bundle", manifest, model_text, reference)
        bundle = load_bundle(Path(folder) / "bundle")
    explainer = Explainer(bundle)
    catalogue = explainer.catalogue
    names = bundle.spec.feature_names
    for _ in range(3):
        table = data.draw(inputs(spec))
        explanation = explainer.explain(table)
        values = explanation.features.values
        contributions = explanation.contributions.values
        rows = len(table)

        # Every number finite; probabilities are probabilities.
        assert contributions.shape == (rows, len(names))
        assert np.isfinite(contributions).all()
        assert math.isfinite(explanation.contributions.base_value)
        assert np.isfinite(explanation.probability).all()
        assert ((explanation.probability >= 0) & (explanation.probability <= 1)).all()
        assert np.isfinite(explanation.code_contributions).all()
        # No infinity ever reaches the model: it is flagged and treated as missing.
        assert not np.isinf(values).any()

        # Local accuracy (Lundberg & Lee 2017, "A Unified Approach to Interpreting Model
        # Predictions", property 1): base value + contributions = the model's raw output, here
        # checked against LightGBM's plain prediction rather than the explainer's own sum.
        raw = bundle.booster.predict(values, raw_score=True)
        np.testing.assert_allclose(explanation.contributions.raw, raw, rtol=1e-9, atol=1e-9)

        # Platt scaling (Platt 1999): p = 1 / (1 + exp(-(a * raw + b))); isotonic stays within
        # its fitted range. The decision is p >= threshold.
        calibration = bundle.manifest.calibration
        if calibration.method == "sigmoid":
            expected = 1.0 / (1.0 + np.exp(-(calibration.slope * raw + calibration.intercept)))
            np.testing.assert_allclose(explanation.probability, expected, rtol=1e-12, atol=1e-15)
        else:
            assert (explanation.probability >= min(calibration.knots_y) - 1e-12).all()
            assert (explanation.probability <= max(calibration.knots_y) + 1e-12).all()
        threshold = bundle.manifest.decision.threshold
        assert (explanation.decision == (explanation.probability >= threshold)).all()

        for row in range(rows):
            expected_codes = _code_contributions(catalogue.codes, bundle, values[row],
                                                 contributions[row])
            reasons = explanation.reasons[row]
            got = [r.contribution for r in reasons]
            assert len(reasons) <= explainer.top_k
            assert got == sorted(got, reverse=True)
            assert all(math.isfinite(v) and v > explainer.min_contribution for v in got)
            # The reasons are the strongest codes above the floor, each the exact sum of its
            # features' contributions (SHAP values are additive), worked out here from the spec.
            strongest = sorted((v for v in expected_codes.values()
                                if v > explainer.min_contribution), reverse=True)
            np.testing.assert_allclose(got, strongest[: explainer.top_k], rtol=1e-12, atol=1e-12)
            for reason in reasons:
                assert reason.contribution == pytest.approx(expected_codes[reason.code],
                                                            rel=1e-12, abs=1e-12)
        records = explanation_records(explanation, threshold, names, True)
        json.dumps(records, allow_nan=False)  # what the API and JSONL output send: no NaN/inf


def _code_contributions(codes: Any, bundle: Any, values: np.ndarray,
                        contributions: np.ndarray) -> dict[str, float]:
    """Each catalogue code's contribution for one event, from the README's definition: the sum
    of its features' contributions; a ``high`` (``low``) code only when its first feature is
    above (below) the typical value from training."""
    names = bundle.spec.feature_names
    out = {}
    for code in codes:
        total = float(sum(contributions[names.index(f)] for f in code.features))
        if code.direction != "any":
            first = values[names.index(code.features[0])]
            typical = bundle.manifest.stats[code.features[0]].typical
            side = first > typical if code.direction == "high" else first < typical
            total = total if side else 0.0
        out[code.code] = total
    return out
