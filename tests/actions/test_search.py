"""What to change (causeline.service.actions.search) against a brute-force search.

On small models trained on random integer data, the reference tries every integer value of
every pair of changeable features (the whole allowed domain, a plain exhaustive search written
here without thresholds or intervals) and keeps the cheapest combination that brings the
model's calibrated probability below the threshold. The interval search must find the same
lowest cost, and its action must respect ranges, directions and steps and leave observable
features alone. With a reason code over ``a`` and the observable ``c`` (which the data makes
follow ``a``), ``c`` moves with ``a`` along the least-squares line (numpy's polyfit is the
reference for the slope); the brute force moves it the same way, and the costs must still agree.
"""

from __future__ import annotations

import itertools
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from causeline.service.actions.search import ActionFinder
from causeline.service.bundle.load import load_bundle
from causeline.service.errors import ConfigError
from causeline.service.spec.base import validate_model
from causeline.service.spec.dataset import DatasetSpec
from causeline.training.pipeline import train

DOMAIN = range(0, 21)


def _config(cost: tuple[float, float], per_unit: tuple[float, float], direction: str,
            follow: bool = False) -> dict:
    codes = [{"code": "A_AND_C", "features": ["a", "c"], "direction": "high",
              "text": "a {a}, c {c}"}] if follow else []
    return {"reason_codes": codes,
        "name": "toy", "target": "y", "id": "id",
        "features": [
            {"name": "a", "role": "controllable",
             "change": {"min": 0, "max": 20, "step": 1, "cost": cost[0],
                        "cost_per_unit": per_unit[0], "direction": direction}},
            {"name": "b", "role": "controllable",
             "change": {"min": 0, "max": 20, "step": 1, "cost": cost[1],
                        "cost_per_unit": per_unit[1]}},
            {"name": "c", "role": "observable"},
        ],
        "training": {"lightgbm": {"num_leaves": 4, "min_child_samples": 10},
                     "max_rounds": 30},
    }


def _bundle(tmp: Path, seed: int, config: dict) -> Path:
    rng = np.random.default_rng(seed)
    n = 1500
    table = pd.DataFrame({"id": [f"r{i}" for i in range(n)],
                          "a": rng.integers(0, 21, n), "b": rng.integers(0, 21, n),
                          "c": rng.integers(0, 21, n)})
    if config["reason_codes"]:  # c follows a
        table["c"] = np.clip(table["a"] + rng.integers(-3, 4, n), 0, 20)
    risk = 0.25 * (table["a"] - 12) + 0.2 * (table["b"] - 10) + 0.1 * (table["c"] - 10)
    table["y"] = (rng.uniform(size=n) < 1 / (1 + np.exp(-risk))).astype(int)
    (tmp / "config.yaml").write_text(yaml.safe_dump(config), "utf-8")
    table.to_csv(tmp / "data.csv", index=False)
    train(tmp / "config.yaml", tmp / "data.csv", tmp / "bundle")
    return tmp / "bundle"


def _brute(finder: ActionFinder, row: np.ndarray, threshold: float, config: dict,
           slope: float = 0.0) -> float | None:
    """The lowest cost over every integer setting of one or both features (``c`` moved with
    ``a`` by ``slope`` within its training range 0..20)."""
    changes = {f["name"]: f["change"] for f in config["features"] if "change" in f}
    best = None
    for names in (["a"], ["b"], ["a", "b"]):
        for values in itertools.product(DOMAIN, repeat=len(names)):
            moved = row.copy()
            cost = 0.0
            allowed = True
            for name, value in zip(names, values, strict=True):
                i = finder.names.index(name)
                change = changes[name]
                if value == row[i]:
                    allowed = False  # not a change
                if change.get("direction") == "decrease" and value > row[i]:
                    allowed = False
                moved[i] = value
                cost += change["cost"] + change["cost_per_unit"] * abs(value - row[i])
                if name == "a" and slope:
                    c = finder.names.index("c")
                    moved[c] = np.clip(row[c] + slope * (value - row[i]), 0, 20)
            if allowed and finder.probability(moved[None, :])[0] < threshold:
                best = cost if best is None else min(best, cost)
    return best


@settings(max_examples=12, deadline=None, suppress_health_check=[HealthCheck.too_slow,
                                                                  HealthCheck.function_scoped_fixture])
@given(seed=st.integers(0, 10_000),
       cost=st.tuples(st.sampled_from([0.0, 1.0, 5.0]), st.sampled_from([0.0, 2.0])),
       per_unit=st.tuples(st.sampled_from([0.0, 0.5, 3.0]), st.sampled_from([0.1, 1.0])),
       direction=st.sampled_from(["both", "decrease"]), follow=st.booleans())
def test_the_interval_search_finds_the_brute_force_optimum(  # type: ignore[no-untyped-def]
    tmp_path_factory, seed, cost, per_unit, direction, follow
) -> None:
    config = _config(cost, per_unit, direction, follow)
    folder = tmp_path_factory.mktemp("toy")
    bundle = load_bundle(_bundle(folder, seed, config))
    finder = ActionFinder(bundle, max_changes=2)
    slope = 0.0
    if follow:
        data = pd.read_csv(folder / "data.csv")
        slope = float(np.polyfit(data["a"], data["c"], 1)[0])
        assert bundle.manifest.stats["a"].follows == {"c": pytest.approx(slope)}
    threshold = bundle.manifest.decision.threshold
    rng = np.random.default_rng(seed + 1)
    rows = rng.integers(0, 21, size=(12, 3)).astype(float)
    checked = 0
    for row in rows:
        action = finder.find(row)
        if action.probability_before < threshold:
            assert action.changes == [] and action.reached
            continue
        checked += 1
        expected = _brute(finder, row, threshold, config, slope)
        if expected is None:
            assert not action.reached
            continue
        assert action.reached and action.probability_after < threshold
        assert action.cost == pytest.approx(expected), (row, action)
        for change in action.changes:
            assert change.feature in ("a", "b")  # c is observable: never moved
            assert 0 <= change.after <= 20 and float(change.after).is_integer()
            if change.feature == "a" and direction == "decrease":
                assert change.after < change.before
    assert checked >= 3  # most random rows start above the threshold


def test_change_settings_are_checked_with_the_key_named() -> None:
    base = _config((1.0, 1.0), (0.0, 0.0), "both")
    base["features"][2]["change"] = {"min": 0}
    with pytest.raises(ConfigError, match=r"change: only a controllable feature changes"):
        validate_model(DatasetSpec, {k: v for k, v in base.items() if k != "training"},
                       "config.yaml")
    base = _config((1.0, 1.0), (0.0, 0.0), "both")
    base["features"][0]["change"]["min"] = 30
    with pytest.raises(ConfigError, match=r"min is above max"):
        validate_model(DatasetSpec, {k: v for k, v in base.items() if k != "training"},
                       "config.yaml")


def test_what_to_change_needs_change_settings(tmp_path, capsys) -> None:  # type: ignore[no-untyped-def]
    from causeline.cli import main

    config = _config((1.0, 1.0), (0.0, 0.0), "both")
    for feature in config["features"]:
        feature.pop("change", None)
    bundle = _bundle(tmp_path, 3, config)
    code = main(["explain", "--bundle", str(bundle), "--input", str(tmp_path / "data.csv"),
                 "--out", str(tmp_path / "out.csv"), "--what-to-change"])
    assert code == 2 and "no controllable feature a `change:` setting" in capsys.readouterr().err
    assert not (tmp_path / "out.csv").exists()


def test_json_lines_say_null_where_no_change_is_proposed(tmp_path) -> None:  # type: ignore[no-untyped-def]
    # JSON (RFC 8259) has no NaN: an event below the threshold needs no change, and its
    # record says null; an event at or above it has its changes, with reason codes after.
    import json

    from causeline.cli import main

    bundle = _bundle(tmp_path, 5, _config((1.0, 1.0), (0.0, 0.0), "both"))
    out = tmp_path / "out.jsonl"
    assert main(["explain", "--bundle", str(bundle), "--input", str(tmp_path / "data.csv"),
                 "--out", str(out), "--what-to-change"]) == 0
    text = out.read_text("utf-8")
    assert "NaN" not in text
    lines = [json.loads(line) for line in text.splitlines()]
    records = [line["what_to_change"] for line in lines]
    assert all((r is None) == (not line["decision"])
               for r, line in zip(records, lines, strict=True))
    assert None in records
    moved = [r for r in records if r and r["changes"]]
    assert moved and all(set(c) == {"feature", "from", "to"} for r in moved
                         for c in r["changes"])
    assert all(isinstance(r["reason_codes_after"], list) for r in moved)


def test_a_missing_follower_stays_missing_and_is_not_listed(tmp_path) -> None:  # type: ignore[no-untyped-def]
    config = _config((1.0, 1.0), (0.0, 0.0), "both", follow=True)
    bundle = load_bundle(_bundle(tmp_path, 11, config))
    finder = ActionFinder(bundle, max_changes=2)
    c = finder.names.index("c")
    for a in range(21):
        row = np.array([float(a), 20.0, np.nan])
        row[c] = np.nan
        action = finder.find(row)
        assert action.moved == []
        assert all(np.isnan(v) for j, v in action.edits if j == c)
