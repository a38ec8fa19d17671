"""On the invented fleet, the top reason code names the cause the generator planted.

The generator records each event's planted cause in a column the model never sees, so this is a
check against known ground truth rather than against the model's own output.
"""

from __future__ import annotations

import numpy as np

from causeline.service.explain.explainer import Explainer
from tests.conftest import DEMO_CAUSE_CODES

CAUSE_CODES = DEMO_CAUSE_CODES


def test_top_reason_is_the_planted_cause(demo_bundle, demo_table) -> None:
    single = demo_table[
        (demo_table["went_warm_24h"] == 1)
        & (demo_table["planted_causes_active"] == 1)
        & demo_table["planted_cause"].isin(list(CAUSE_CODES))
    ]
    explanation = Explainer(demo_bundle).explain(single)
    top = np.array([r[0].code if r else "" for r in explanation.reasons], dtype=object)
    expected = single["planted_cause"].map(CAUSE_CODES).to_numpy(dtype=object)
    assert (top == expected).mean() >= 0.85
    for cause, code in CAUSE_CODES.items():
        rows = single["planted_cause"].to_numpy() == cause
        # Each cause on its own, so one strong cause cannot hide a weak one.
        assert (top[rows] == code).mean() >= 0.70, cause


def test_demo_split_is_by_time_and_model_learns(demo_bundle) -> None:
    training = demo_bundle.manifest.training
    assert training["split"]["method"] == "time"
    assert demo_bundle.manifest.metrics["roc_auc"] >= 0.75


def test_reason_text_shows_the_events_values(demo_bundle, demo_table) -> None:
    rows = demo_table[demo_table["planted_cause"] == "long_defrost"].head(20)
    explanation = Explainer(demo_bundle).explain(rows)
    found = [r for reasons in explanation.reasons for r in reasons
             if r.code == "DEFROST_INTERVAL_LONG"]
    assert found
    for reason in found:
        interval = reason.values["defrost_interval_h"]
        assert f"Defrost every {interval:g} h" in reason.text
        assert "{" not in reason.text
