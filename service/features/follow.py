"""Observable features that move with a controllable one when it is changed.

A reason code groups the features of one mechanism, e.g. days since the coil was cleaned
(controllable) with the discharge pressure a dirty coil drives up (observable). A what-if that
changes the controllable feature alone would leave the model looking at the same high pressure.
So each observable numeric feature that shares a code with a controllable one follows it along
the least-squares line fitted over the training rows. That is a linear, associational
assumption (the data's, not a physical law), which is why results built on it are model
estimates. The root-cause fix simulation and the what-to-change search both use it.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from causeline.service.spec.dataset import DatasetSpec


def co_drivers(spec: DatasetSpec, feature: str) -> list[str]:
    """Observable numeric features that share a reason code with ``feature``, in code order."""
    out: list[str] = []
    for code in spec.reason_codes:
        if feature not in code.features:
            continue
        for other in code.features:
            candidate = spec.feature(other)
            if other != feature and candidate.role == "observable" \
                    and candidate.kind == "numeric" and other not in out:
                out.append(other)
    return out


def slope(x: np.ndarray, y: np.ndarray) -> float:
    """Least-squares slope of y on x over rows where both are present (0 when undefined)."""
    both = ~(np.isnan(x) | np.isnan(y))
    if both.sum() < 3 or np.var(x[both]) == 0:
        return 0.0
    return float(np.cov(x[both], y[both], bias=True)[0, 1] / np.var(x[both]))


def follower_slopes(spec: DatasetSpec, names: Sequence[str],
                    values: np.ndarray) -> dict[str, dict[str, float]]:
    """Per controllable numeric feature that may change, its followers and their slopes.

    Each observable follows one controllable feature at most (the first in the config), so a
    change of two features never moves one follower twice and the search stays exact."""
    out: dict[str, dict[str, float]] = {}
    taken: set[str] = set()
    for feature in spec.features:
        if feature.role != "controllable" or feature.change is None \
                or feature.kind != "numeric":
            continue
        for other in co_drivers(spec, feature.name):
            if other in taken:
                continue
            s = slope(values[:, names.index(feature.name)], values[:, names.index(other)])
            if s != 0.0:
                out.setdefault(feature.name, {})[other] = s
                taken.add(other)
    return out


def carry(before: np.ndarray, after: np.ndarray, driver: int, follower: int, rate: float,
          low: float, high: float) -> None:
    """Move column ``follower`` of ``after`` with column ``driver``: its value in ``before``
    plus ``rate`` times the driver's change (none where either driver value is missing), kept
    within ``[low, high]`` (the training range). In place on ``after``."""
    shift = rate * np.nan_to_num(after[:, driver] - before[:, driver])
    after[:, follower] = np.clip(before[:, follower] + shift, low, high)
