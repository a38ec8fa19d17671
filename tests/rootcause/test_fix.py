"""The fix simulation moves a fixed feature's followers as the what-to-change search does."""

from __future__ import annotations

import numpy as np
import pandas as pd

from causeline.service.bundle.load import Bundle
from causeline.service.explain.explainer import Explainer
from causeline.service.rootcause.fix import fix_targets, fixed_features


def test_cleaning_the_coil_moves_the_pressure_along_the_bundles_line(
    demo_bundle: Bundle, demo_table: pd.DataFrame
) -> None:
    # Coil cleaning caps days_since_coil_clean at 30; the discharge pressure a dirty coil drives
    # up follows it along the training rows' line kept in the bundle, whatever rows the job
    # passes as its reference (here 50 rows of coils cleaned recently, whose own line differs),
    # so the root-cause estimate and the what-to-change search answer the same what-if.
    spec, stats = demo_bundle.spec, demo_bundle.manifest.stats
    rate = stats["days_since_coil_clean"].follows["discharge_pressure_kpa"]
    names = spec.feature_names
    day, pressure = names.index("days_since_coil_clean"), names.index("discharge_pressure_kpa")
    catalogue = Explainer(demo_bundle).catalogue
    targets = fix_targets(catalogue, ["CONDENSER_FOULED"])
    dirty = demo_table[demo_table["days_since_coil_clean"] > 60].head(200)
    recent = demo_table[demo_table["days_since_coil_clean"] < 10].head(50)
    reference = demo_bundle.builder.transform(recent).values
    before = demo_bundle.builder.transform(dirty).values
    after = fixed_features(demo_bundle, dirty, targets, reference)
    assert np.all(after[:, day] == 30)
    expected = np.clip(before[:, pressure] + rate * (30 - before[:, day]),
                       stats["discharge_pressure_kpa"].minimum,
                       stats["discharge_pressure_kpa"].maximum)
    np.testing.assert_allclose(after[:, pressure], expected)
    # The pressure falls with a cleaner coil (the demo's generator raises it with dirt).
    assert rate > 0 and np.all(after[:, pressure] <= before[:, pressure])
