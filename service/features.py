"""From an input table to the model's feature matrix.

Training and scoring both go through :class:`FeatureBuilder`, so a feature is computed the same way
everywhere. Problems with individual rows (a word where a number belongs, an unknown category,
infinity) are collected per row rather than raised, so that callers decide: training refuses the
table, batch jobs report the rows, the HTTP layer answers 422.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from service.errors import DataError
from service.expressions import parse_expression
from service.spec import FeatureSpec


@dataclass(frozen=True)
class RowProblem:
    """Something wrong with one cell: ``row`` is the position in the input table."""

    row: int
    column: str
    message: str


@dataclass(frozen=True)
class FeatureMatrix:
    """Model-ready values (float64, categories as integer codes, NaN for missing)."""

    values: np.ndarray
    names: list[str]
    problems: list[RowProblem]

    def bad_rows(self) -> np.ndarray:
        """Positions of rows with at least one problem."""
        return np.unique(np.array([p.row for p in self.problems], dtype=np.int64))


class FeatureBuilder:
    """Turns raw columns into features for a fixed list of feature specs.

    ``categories`` gives, per categorical feature, the ordered category list whose positions are
    the integer codes the model was trained on.
    """

    def __init__(
        self,
        features: Sequence[FeatureSpec],
        categories: Mapping[str, Sequence[str]] | None = None,
    ) -> None:
        self.features = list(features)
        self.categories = {name: list(values) for name, values in (categories or {}).items()}
        self._expressions = {
            f.name: parse_expression(f.expr) for f in self.features if f.expr is not None
        }
        for feature in self.features:
            if feature.kind == "categorical" and feature.name not in self.categories:
                if feature.categories is None:
                    raise DataError(f"feature {feature.name!r}: no category list is known")
                self.categories[feature.name] = list(feature.categories)
        self._index = {name: pd.Index(values) for name, values in self.categories.items()}

    @property
    def names(self) -> list[str]:
        return [feature.name for feature in self.features]

    @property
    def required_columns(self) -> list[str]:
        """Raw columns an input must hold, in a stable order."""
        raw = {f.name: f.source_column for f in self.features if not f.derived}
        needed: list[str] = []
        for feature in self.features:
            if feature.derived:
                for name in sorted(self._expressions[feature.name].names):
                    needed.append(raw.get(name, name))
            else:
                needed.append(feature.source_column)
        return list(dict.fromkeys(needed))

    def missing_columns(self, columns: Iterable[str]) -> list[str]:
        present = set(columns)
        return [column for column in self.required_columns if column not in present]

    def transform(self, table: pd.DataFrame) -> FeatureMatrix:
        """Build the feature matrix; raises :class:`DataError` only for missing columns."""
        missing = self.missing_columns(table.columns)
        if missing:
            raise DataError(f"missing column {missing[0]!r}" + _more(missing))
        problems: list[RowProblem] = []
        raw_values: dict[str, np.ndarray] = {}
        for feature in self.features:
            if feature.derived:
                continue
            column = table[feature.source_column]
            if feature.kind == "categorical":
                values = self._encode(feature, column, problems)
            else:
                values = _numeric(feature, column, problems)
            raw_values[feature.name] = values
        columns = _ColumnView(raw_values, table, problems)
        out = np.empty((len(table), len(self.features)), dtype=np.float64)
        for position, feature in enumerate(self.features):
            if feature.derived:
                values = self._expressions[feature.name].evaluate(columns)
                values = np.broadcast_to(values, (len(table),)).astype(np.float64)
                # A derived value that cannot be computed (say, a division by zero) is missing.
                values[~np.isfinite(values)] = np.nan
            else:
                values = raw_values[feature.name]
            if not feature.allow_missing:
                for row in np.flatnonzero(np.isnan(values)):
                    problems.append(RowProblem(int(row), feature.name, "value is missing"))
            out[:, position] = values
        return FeatureMatrix(out, self.names, problems)

    def _encode(
        self, feature: FeatureSpec, column: pd.Series, problems: list[RowProblem]
    ) -> np.ndarray:
        text = column.to_numpy(dtype=object, na_value=None)
        present = np.array([value is not None for value in text], dtype=bool)
        cleaned = [str(value).strip() if value is not None else "" for value in text]
        codes = self._index[feature.name].get_indexer(cleaned).astype(np.float64)
        codes[~present] = -1.0
        for row in np.flatnonzero(present & (codes < 0)):
            problems.append(
                RowProblem(int(row), feature.name, f"unknown category {cleaned[row]!r}")
            )
        codes[codes < 0] = np.nan
        return codes


class _ColumnView(Mapping[str, np.ndarray]):
    """Names an expression may read: raw features, else raw columns converted to numbers."""

    def __init__(
        self, features: dict[str, np.ndarray], table: pd.DataFrame, problems: list[RowProblem]
    ) -> None:
        self._features = features
        self._table = table
        self._problems = problems

    def __getitem__(self, name: str) -> np.ndarray:
        if name not in self._features:
            column = self._table[name]
            self._features[name] = _to_float(name, column, self._problems)
        return self._features[name]

    def __iter__(self):  # type: ignore[no-untyped-def]
        return iter(self._features)

    def __len__(self) -> int:
        return len(self._features)


def _numeric(feature: FeatureSpec, column: pd.Series, problems: list[RowProblem]) -> np.ndarray:
    values = _to_float(feature.name, column, problems)
    _flag_infinite(values, feature.name, problems)
    values[np.isinf(values)] = np.nan
    return values


def _to_float(name: str, column: pd.Series, problems: list[RowProblem]) -> np.ndarray:
    # Numbers need no parsing; this fast path keeps single-event scoring cheap.
    if column.dtype.kind in "biuf":
        return column.to_numpy(dtype=np.float64, copy=True)
    if pd.api.types.is_bool_dtype(column.dtype) or pd.api.types.is_numeric_dtype(column.dtype):
        return column.astype("float64").to_numpy(dtype=np.float64, na_value=np.nan, copy=True)
    converted = pd.to_numeric(column, errors="coerce")
    values = converted.astype("float64").to_numpy(dtype=np.float64, na_value=np.nan, copy=True)
    bad = np.flatnonzero(column.notna().to_numpy() & np.isnan(values))
    for row in bad:
        text = str(column.iloc[row])
        if text.strip().lower() in {"nan", ""}:
            continue
        problems.append(RowProblem(int(row), name, f"not a number: {text[:40]!r}"))
    return values


def _flag_infinite(values: np.ndarray, name: str, problems: list[RowProblem]) -> None:
    for row in np.flatnonzero(np.isinf(values)):
        problems.append(RowProblem(int(row), name, "value is infinite"))


def _more(items: list[str]) -> str:
    return f" (and {len(items) - 1} more: {', '.join(items[1:4])})" if len(items) > 1 else ""
