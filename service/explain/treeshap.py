"""The reference engine: LightGBM's own TreeSHAP, and the contributions every engine returns.

``Booster.predict(pred_contrib=True)`` computes exact path-dependent SHAP values (Lundberg, Erion
& Lee 2018) in the model's raw output, log-odds of an event. Faster engines (``fastshap``) return
the same :class:`Contributions` and fall back to this one.
"""

from __future__ import annotations

from dataclasses import dataclass

import lightgbm as lgb
import numpy as np

ENGINE = "lightgbm-treeshap"
SMALL_BATCH = 64


@dataclass(frozen=True)
class Contributions:
    """SHAP values per event and feature, and the base value they add up from."""

    values: np.ndarray
    base_value: float

    @property
    def raw(self) -> np.ndarray:
        """Base value plus the sum of contributions: the model's raw score (local accuracy)."""
        return self.base_value + self.values.sum(axis=1)


def contributions(booster: lgb.Booster, features: np.ndarray) -> Contributions:
    """Exact TreeSHAP values for each row of ``features``."""
    rows = features if features.shape[0] else np.full((1, features.shape[1]), np.nan)
    # Starting threads costs more than a few rows take to explain on one.
    threads = 1 if rows.shape[0] <= SMALL_BATCH else 0
    out = np.asarray(
        booster.predict(rows, pred_contrib=True, num_threads=threads), dtype=np.float64
    )
    # The last column is the expected value, the same on every row.
    base = float(out[0, -1])
    return Contributions(values=out[: features.shape[0], :-1], base_value=base)
