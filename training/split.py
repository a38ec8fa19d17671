"""Holding rows out without leaking the future or an entity's other rows.

Three parts: *fit* (trees), *valid* (early stopping, calibration, threshold) and *test* (the
metrics reported). By time, the latest rows are held out; by entity, whole entities are.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from causeline.service.errors import DataError
from causeline.training.config import SplitSettings


@dataclass(frozen=True)
class Split:
    method: str
    fit: np.ndarray
    valid: np.ndarray
    test: np.ndarray

    def summary(self) -> dict[str, object]:
        return {
            "method": self.method,
            "fit_rows": int(self.fit.size),
            "valid_rows": int(self.valid.size),
            "test_rows": int(self.test.size),
        }


def split_rows(
    settings: SplitSettings,
    y: np.ndarray,
    times: pd.Series | None,
    entities: pd.Series | None,
    seed: int,
) -> Split:
    method = settings.by
    if method == "auto":
        method = "time" if times is not None else "entity" if entities is not None else "random"
    if method == "time":
        if times is None:
            raise DataError("training.split.by is 'time' but the config names no time column")
        return _by_time(settings, times)
    if method == "entity":
        if entities is None:
            raise DataError("training.split.by is 'entity' but the config names no entity column")
        return _by_entity(settings, entities, seed)
    return _random(settings, y, seed)


def _by_time(settings: SplitSettings, times: pd.Series) -> Split:
    # Cut at time points, not row counts, so one moment never straddles two parts.
    stamps = times.dt.tz_convert(None).to_numpy().astype("datetime64[s]").astype(np.int64)
    test_cut = np.quantile(stamps, 1.0 - settings.holdout)
    earlier = stamps < test_cut
    if not earlier.any():
        raise DataError("every row has the same time; splitting by time needs a spread")
    valid_cut = np.quantile(stamps[earlier], 1.0 - settings.validation)
    rows = np.arange(stamps.size)
    fit = rows[stamps < valid_cut]
    valid = rows[(stamps >= valid_cut) & earlier]
    return Split("time", fit, valid, rows[~earlier])


def _by_entity(settings: SplitSettings, entities: pd.Series, seed: int) -> Split:
    names = entities.astype("string").fillna("").to_numpy(dtype=object)
    unique = np.array(sorted(set(names)), dtype=object)
    order = np.random.default_rng(seed).permutation(unique.size)
    n_test = max(1, round(unique.size * settings.holdout))
    n_valid = max(1, round((unique.size - n_test) * settings.validation))
    if unique.size < 3:
        raise DataError("splitting by entity needs at least 3 entities")
    test_set = set(unique[order[:n_test]])
    valid_set = set(unique[order[n_test : n_test + n_valid]])
    part = np.array([2 if n in test_set else 1 if n in valid_set else 0 for n in names])
    rows = np.arange(len(names))
    return Split("entity", rows[part == 0], rows[part == 1], rows[part == 2])


def _random(settings: SplitSettings, y: np.ndarray, seed: int) -> Split:
    # Stratified, so that each part keeps the event rate.
    rng = np.random.default_rng(seed)
    part = np.zeros(len(y), dtype=np.int8)
    for label in (0, 1):
        rows = rng.permutation(np.flatnonzero(y == label))
        n_test = round(rows.size * settings.holdout)
        n_valid = round((rows.size - n_test) * settings.validation)
        part[rows[:n_test]] = 2
        part[rows[n_test : n_test + n_valid]] = 1
    rows = np.arange(len(y))
    return Split("random", rows[part == 0], rows[part == 1], rows[part == 2])
