"""Checks that a table fits its config, each failing with one line that names the column."""

from __future__ import annotations

import numpy as np
import pandas as pd

from causeline.service.bundle.manifest import FeatureStats
from causeline.service.errors import DataError
from causeline.service.features.builder import FeatureBuilder, FeatureMatrix
from causeline.service.files.tables import binary_column
from causeline.training.config import TrainConfig


def check_columns(table: pd.DataFrame, config: TrainConfig, builder: FeatureBuilder) -> None:
    """Every column the config names must be in the table."""
    named = [config.id, config.target, config.time, config.entity, *builder.required_columns]
    for column in dict.fromkeys(c for c in named if c is not None):
        if column not in table.columns:
            raise DataError(f"column {column!r} is in the config but not in the data")
    if table[config.id].isna().any():
        raise DataError(f"column {config.id!r} (id) has missing values")
    duplicated = table[config.id][table[config.id].duplicated()]
    if len(duplicated):
        raise DataError(f"column {config.id!r} (id) repeats {duplicated.iloc[0]!r}")


def labels(table: pd.DataFrame, target: str) -> np.ndarray:
    """The target as 0/1; anything else (2, 'maybe', missing) stops with the offending value."""
    return binary_column(table[target], target, "target").astype(np.int8)


def parse_times(table: pd.DataFrame, column: str) -> pd.Series:
    times = pd.to_datetime(table[column], errors="coerce", utc=True, format="mixed")
    bad = times.isna() & table[column].notna()
    if bad.any() or times.isna().any():
        example = table[column][times.isna()].iloc[0]
        raise DataError(f"column {column!r} (time) has a value that is not a time: {example!r}")
    return times


def check_features(matrix: FeatureMatrix, config: TrainConfig) -> None:
    """Cell problems, and features that cannot teach the model anything."""
    if matrix.problems:
        first = matrix.problems[0]
        spec = config.feature(first.column) if first.column in config.feature_names else None
        column = spec.source_column if spec is not None and not spec.derived else first.column
        count = len(matrix.problems)
        more = f" ({count - 1} more problems)" if count > 1 else ""
        raise DataError(f"column {column!r}: row {first.row + 1}: {first.message}{more}")
    for position, name in enumerate(matrix.names):
        values = matrix.values[:, position]
        present = values[~np.isnan(values)]
        label = _label(config, name)
        if present.size == 0:
            raise DataError(f"{label} is missing on every row")
        if np.all(present == present[0]):
            raise DataError(f"{label} is constant ({present[0]:g}); remove it from the config")


def _label(config: TrainConfig, name: str) -> str:
    feature = config.feature(name)
    if feature.derived:
        return f"derived feature {name!r} ({feature.expr})"
    if feature.source_column != name:
        return f"feature {name!r} (column {feature.source_column!r})"
    return f"feature {name!r}"


def check_events(y: np.ndarray, minimum: int, part: str = "the data") -> None:
    events = int(y.sum())
    if events < minimum:
        raise DataError(
            f"too few events in {part}: {events} (at least {minimum} are needed; "
            "see training.min_events)"
        )
    if events == len(y):
        raise DataError(f"every row in {part} is an event; there is nothing to tell apart")


def feature_stats(
    matrix: FeatureMatrix, categories: dict[str, list[str]]
) -> dict[str, FeatureStats]:
    """Ranges, typical values and categories as seen in the training part."""
    out: dict[str, FeatureStats] = {}
    for position, name in enumerate(matrix.names):
        values = matrix.values[:, position]
        present = values[~np.isnan(values)]
        missing = float(1.0 - present.size / max(values.size, 1))
        if name in categories:
            counts = np.bincount(present.astype(np.int64), minlength=len(categories[name]))
            out[name] = FeatureStats(
                typical=categories[name][int(np.argmax(counts))],
                missing_share=missing,
                categories=tuple(categories[name]),
            )
        else:
            out[name] = FeatureStats(
                minimum=float(present.min()),
                maximum=float(present.max()),
                typical=float(np.median(present)),
                missing_share=missing,
            )
    return out


def learn_categories(table: pd.DataFrame, config: TrainConfig) -> dict[str, list[str]]:
    """Category lists: the config's when given, else the sorted values present in the data."""
    out: dict[str, list[str]] = {}
    for feature in config.features:
        if feature.kind != "categorical":
            continue
        if feature.categories is not None:
            out[feature.name] = list(feature.categories)
            continue
        values = table[feature.source_column].dropna().astype("string").str.strip().unique()
        out[feature.name] = sorted(str(value) for value in values)
    return out
