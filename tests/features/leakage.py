"""A probe for look-ahead leakage in any snapshot builder (used by the timeline tests)."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pandas as pd

from causeline.service.errors import DataError


def check_no_leakage(
    builder: Callable[[pd.DataFrame], pd.DataFrame],
    readings: pd.DataFrame,
    entity: str,
    time: str,
    measurements: list[str],
    seed: int = 0,
) -> list[str]:
    """Columns of ``builder``'s output that change at some time t when only rows after t change.

    Picks a cut-off inside each entity's readings, scales, shifts and thins every reading after
    it, rebuilds, and compares each snapshot at or before the cut-off. ``builder`` maps readings
    to a table with the same ``entity`` and ``time`` columns. An empty list means no leak seen.
    """
    rng = np.random.default_rng(seed)
    times = pd.Series(readings[time].to_numpy())
    ordered = times.groupby(readings[entity].to_numpy()).rank(method="first", pct=True)
    cutoff_share = rng.uniform(0.3, 0.7)
    cut_rank = ordered.to_numpy() <= cutoff_share
    cutoff = times[cut_rank].groupby(readings[entity].to_numpy()[cut_rank]).max()
    limit = readings[entity].map(cutoff).to_numpy()
    later = ~pd.isna(limit) & (times.to_numpy() > limit)
    changed = readings.copy()
    for column in measurements:
        values = changed[column].to_numpy(dtype=np.float64).copy()
        values[later] = values[later] * rng.uniform(2.0, 5.0) + rng.normal(0, 100, later.sum())
        changed[column] = values
    changed = changed[~later | (rng.uniform(size=len(changed)) < 0.6)]
    before, after = builder(readings), builder(changed)
    keys = [entity, time]
    merged = before.merge(after, on=keys, suffixes=("", "__probe"))
    early = merged[time].to_numpy() <= merged[entity].map(cutoff).to_numpy()
    leaking: list[str] = []
    for column in before.columns:
        if column in keys:
            continue
        a, b = merged[column][early], merged[f"{column}__probe"][early]
        same = (a == b) | (a.isna() & b.isna())
        if not bool(same.all()):
            leaking.append(column)
    if not early.any():
        raise DataError("the leakage probe found no snapshot before its cut-off to compare")
    return leaking
