"""AI4I 2020 (Matzka 2020, UCI; CC BY 4.0): explanations follow the published failure mechanisms.

The data set's documentation states each failure mode's generating rule (see
fixtures/ai4i2020/SOURCE.md): HDF from a small process-air temperature gap with low speed, PWF
from power outside 3500-9000 W, OSF from tool wear x torque over a limit, TWF from tool wear.
"""

from __future__ import annotations

import numpy as np
import pytest

from causeline.service.explain.explainer import Explainer

MODES = ["TWF", "HDF", "PWF", "OSF", "RNF"]
MECHANISM_CODES = {
    "HDF": {"HEAT_GAP_LOW", "SPEED_LOW"},
    "PWF": {"POWER_OUT_OF_BAND"},
    "OSF": {"STRAIN_HIGH"},
    "TWF": {"TOOL_WORN"},
}


def test_held_out_roc_auc(ai4i_bundle) -> None:
    # Target from the issue; the published rules make failures largely predictable.
    assert ai4i_bundle.manifest.metrics["roc_auc"] >= 0.95


def test_top_reason_follows_published_mechanism(ai4i_bundle, ai4i_table) -> None:
    explanation = Explainer(ai4i_bundle).explain(ai4i_table)
    top = np.array([r[0].code if r else "" for r in explanation.reasons], dtype=object)
    single = (ai4i_table[MODES].sum(axis=1) == 1) & (ai4i_table["Machine failure"] == 1)
    hits = total = 0
    for mode, codes in MECHANISM_CODES.items():
        rows = np.flatnonzero(single & (ai4i_table[mode] == 1))
        assert rows.size > 20, mode
        hits += int(np.isin(top[rows], list(codes)).sum())
        total += rows.size
    assert hits / total >= 0.90


def test_pwf_reason_shows_the_side_of_the_power_window(ai4i_bundle, ai4i_table) -> None:
    # The published PWF rule fails below 3500 W or above 9000 W; one code covers the band, and
    # its reason shows the run's own power, on the side of the band the rule failed.
    explanation = Explainer(ai4i_bundle).explain(ai4i_table)
    power = ai4i_table["Torque [Nm]"] * ai4i_table["Rotational speed [rpm]"] * 2 * np.pi / 60
    pwf = np.flatnonzero(ai4i_table["PWF"] == 1)
    shown = 0
    for row in pwf:
        reasons = [r for r in explanation.reasons[row] if r.code == "POWER_OUT_OF_BAND"]
        if not reasons:
            continue
        value = float(reasons[0].values["power_w"])
        assert value == pytest.approx(power.iloc[row], rel=1e-6)
        assert value < 3500 or value > 9000
        shown += 1
    assert shown >= 0.9 * pwf.size


def test_the_fresh_simulation_follows_the_public_file_and_its_rules(ai4i_table) -> None:
    # fixtures/ai4i2020/simulate.py stands in for "another draw of the same process" in the
    # root-cause checks, so it must look like the public file (Matzka 2020) and obey the
    # published rules (SOURCE.md), recomputed here from its columns.
    from fixtures.ai4i2020.simulate import simulate

    sim = simulate(rows=30_000, seed=5)
    for column in ("Air temperature [K]", "Process temperature [K]", "Rotational speed [rpm]",
                   "Torque [Nm]", "Tool wear [min]"):
        public, ours = ai4i_table[column], sim[column]
        # A slow random walk's mean wanders: a quarter of a standard deviation.
        assert abs(ours.mean() - public.mean()) <= 0.25 * public.std(), column
        assert 0.75 <= ours.std() / public.std() <= 1.25, column
    gap = sim["Process temperature [K]"] - sim["Air temperature [K]"]
    speed = sim["Rotational speed [rpm]"]
    power = sim["Torque [Nm]"] * speed * 2 * np.pi / 60
    limit = sim["Type"].map({"L": 11_000, "M": 12_000, "H": 13_000})
    assert ((gap < 8.6) & (speed < 1380)).astype(int).equals(sim["HDF"])
    assert ((power < 3500) | (power > 9000)).astype(int).equals(sim["PWF"])
    assert (sim["Tool wear [min]"] * sim["Torque [Nm]"] > limit).astype(int).equals(sim["OSF"])
    # Failure rates per 10,000 runs within a factor of two of the public file's.
    for mode in ("TWF", "HDF", "PWF", "OSF"):
        rate, public_rate = sim[mode].mean(), ai4i_table[mode].mean()
        assert 0.5 * public_rate <= rate <= 2.0 * public_rate, mode
