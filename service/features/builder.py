"""From an input table to the model's feature matrix.

Training and scoring both go through :class:`FeatureBuilder`, so a feature is computed the same way
everywhere. Problems with individual rows (a word where a number belongs, an unknown category,
infinity) are collected per row rather than raised, so that callers decide: training refuses the
table, batch jobs report the rows, the HTTP layer answers 422.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from causeline.service.errors import DataError, RowProblem, quoted
from causeline.service.files.tables import to_numbers
from causeline.service.spec.dataset import FeatureSpec
from causeline.service.spec.expressions import parse_expression


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
        self._numeric_positions = [
            i for i, f in enumerate(self.features) if not f.derived and f.kind == "numeric"
        ]
        self._categorical_positions = [
            i for i, f in enumerate(self.features) if not f.derived and f.kind == "categorical"
        ]
        self._raw_positions = [i for i, f in enumerate(self.features) if not f.derived]
        self._derived_positions = [i for i, f in enumerate(self.features) if f.derived]
        self._names = [f.name for f in self.features]
        self._sources = [f.name if f.derived else f.source_column for f in self.features]
        self._numeric_sources = [self._sources[p] for p in self._numeric_positions]
        self._categorical_sources = [self._sources[p] for p in self._categorical_positions]
        self._required_positions = [i for i, f in enumerate(self.features) if not f.allow_missing]
        self._codes = {
            name: {value: code for code, value in enumerate(values)}
            for name, values in self.categories.items()
        }
        self._required_columns = self._list_required_columns()

    @property
    def names(self) -> list[str]:
        return list(self._names)

    @property
    def required_columns(self) -> list[str]:
        """Raw columns an input must hold, in a stable order."""
        return list(self._required_columns)

    def _list_required_columns(self) -> list[str]:
        raw = {f.name: f.source_column for f in self.features if not f.derived}
        needed: list[str] = []
        for feature in self.features:
            if feature.derived:
                for name in sorted(self._expressions[feature.name].names):
                    needed.append(raw.get(name, name))
            else:
                needed.append(feature.source_column)
        return list(dict.fromkeys(needed))

    def transform(self, table: Table) -> FeatureMatrix:
        """Build the feature matrix; raises :class:`DataError` only for missing columns.

        ``table`` is a DataFrame, or a mapping of column name to equal-length arrays.
        """
        missing = [column for column in self._required_columns if column not in table]
        if missing:
            raise DataError(f"missing column {missing[0]!r}" + _more(missing))
        rows = table_rows(table)
        problems: list[RowProblem] = []
        out = np.empty((rows, len(self.features)), dtype=np.float64)
        numeric = self._numeric_positions
        columns = [column_values(table, self._sources[p]) for p in numeric]
        if all(column.dtype.kind in "biuf" for column in columns):
            # Numbers need no parsing: one copy for them all keeps single events cheap.
            out[:, numeric] = np.array(columns, dtype=np.float64).T
        else:
            for position, column in zip(numeric, columns, strict=True):
                out[:, position] = _to_float(self._names[position], column, problems)
        texts = [column_values(table, self._sources[p], text=True)
                 for p in self._categorical_positions]
        return self._finish(out, texts, table, problems)

    def transform_records(self, records: Sequence[Mapping[str, Any]]) -> FeatureMatrix:
        """:meth:`transform` of the table these records make, for the few events of a request.

        Each record holds every required column, as JSON gives them. Where the numeric fields
        hold only numbers and nulls (what the HTTP checks let through) the matrix is built from
        them in one go; building the columns first cost more than the features themselves.
        Anything else takes the way through columns, so the answer is always ``transform``'s.
        """
        columns = _RecordColumns(records, self._required_columns)
        rows = len(records)
        try:
            numbers = [record[name] for record in records for name in self._numeric_sources]
            texts = [[None if (value := record[name]) is None else str(value)
                      for record in records] for name in self._categorical_sources]
            if not set(map(type, numbers)) <= _NUMBER_TYPES:
                raise TypeError("not only numbers")
            block = np.array(numbers, dtype=np.float64).reshape(rows, len(self._numeric_sources))
        except (KeyError, TypeError, OverflowError):
            # A missing column, text where a number belongs, an integer past float64's range:
            # the columns' way names or reads them.
            return self.transform(columns)
        out = np.empty((rows, len(self.features)), dtype=np.float64)
        out[:, self._numeric_positions] = block
        return self._finish(out, texts, columns, [])

    def _finish(
        self, out: np.ndarray, texts: Sequence[Sequence[Any]], table: Table,
        problems: list[RowProblem],
    ) -> FeatureMatrix:
        """Categories, infinity, derived features and missing values, after the raw numbers."""
        rows = out.shape[0]
        numeric = self._numeric_positions
        for position, column in zip(self._categorical_positions, texts, strict=True):
            out[:, position] = self._encode(self.features[position], column, problems)
        # One pass over every raw number: infinity is a problem, scored as missing.
        infinite = np.isinf(out[:, numeric])
        if infinite.any():
            for row, column in zip(*np.nonzero(infinite), strict=True):
                name = self._names[numeric[column]]
                problems.append(RowProblem(int(row), name, "value is infinite"))
            block = out[:, numeric]
            block[infinite] = np.nan
            out[:, numeric] = block
        if self._derived_positions:
            raw_values = {self._names[p]: out[:, p] for p in self._raw_positions}
            view = _ColumnView(raw_values, table, problems)
            for position in self._derived_positions:
                feature = self.features[position]
                values = self._expressions[feature.name].evaluate(view)
                values = np.broadcast_to(values, (rows,)).astype(np.float64)
                # A derived value that cannot be computed (say, a division by zero) is missing.
                values[~np.isfinite(values)] = np.nan
                out[:, position] = values
        required = self._required_positions
        missing = np.isnan(out[:, required])
        if missing.any():
            # Column by column, so problems come in feature order as the schema lists them.
            for column, row in zip(*np.nonzero(missing.T), strict=True):
                problems.append(RowProblem(int(row), self._names[required[column]],
                                           "value is missing"))
        return FeatureMatrix(out, self.names, problems)

    def _encode(
        self, feature: FeatureSpec, values: Sequence[Any], problems: list[RowProblem]
    ) -> np.ndarray:
        lookup = self._codes[feature.name]
        codes: list[float] = []
        for row, value in enumerate(values):
            if value is None or value is pd.NA or (isinstance(value, float) and value != value):
                codes.append(np.nan)
                continue
            # str() matches how training reads category lists (pandas' string conversion).
            text = str(value).strip()
            code = lookup.get(text)
            if code is None:
                problems.append(RowProblem(row, feature.name, f"unknown category {quoted(text)}"))
                codes.append(np.nan)
            else:
                codes.append(code)
        return np.array(codes, dtype=np.float64)


Table = pd.DataFrame | Mapping[str, np.ndarray]
_NUMBER_TYPES = {int, float, type(None)}


def table_rows(table: Table) -> int:
    if isinstance(table, pd.DataFrame):
        return len(table)
    return len(next(iter(table.values()))) if table else 0


def column_values(table: Table, name: str, text: bool = False) -> np.ndarray:
    """One column as a NumPy array: float64 for numbers, objects (None for missing) otherwise.

    ``text`` keeps the values as they are (a category ``3`` stays ``3``, not ``3.0``).
    """
    column = table[name]
    if not isinstance(column, pd.Series):
        return np.asarray(column)
    if text:
        return column.to_numpy(dtype=object, na_value=None)
    if column.dtype.kind in "biuf":
        return column.to_numpy(dtype=np.float64)
    if pd.api.types.is_numeric_dtype(column.dtype) or pd.api.types.is_bool_dtype(column.dtype):
        return column.to_numpy(dtype=np.float64, na_value=np.nan)
    return column.to_numpy(dtype=object, na_value=None)


class _RecordColumns(Mapping[str, np.ndarray]):
    """Records as columns, each made when first read: numbers and nulls as float64 (null is
    NaN), other columns as objects, as a table of the records would hold them."""

    def __init__(self, records: Sequence[Mapping[str, Any]], names: Sequence[str]) -> None:
        self._records = records
        self._names = list(names)

    def __getitem__(self, name: str) -> np.ndarray:
        if name not in self._names:
            raise KeyError(name)
        values = [record[name] for record in self._records]
        if set(map(type, values)) <= _NUMBER_TYPES:
            try:
                return np.array(values, dtype=np.float64)
            except OverflowError:
                pass
        out = np.empty(len(values), dtype=object)
        out[:] = values
        return out

    def __iter__(self) -> Iterator[str]:
        return iter(self._names)

    def __len__(self) -> int:
        return len(self._names)


class _ColumnView(Mapping[str, np.ndarray]):
    """Names an expression may read: raw features, else raw columns converted to numbers."""

    def __init__(
        self, features: dict[str, np.ndarray], table: Table, problems: list[RowProblem]
    ) -> None:
        self._features = features
        self._table = table
        self._problems = problems

    def __getitem__(self, name: str) -> np.ndarray:
        if name not in self._features:
            column = column_values(self._table, name)
            self._features[name] = _to_float(name, column, self._problems)
        return self._features[name]

    def __iter__(self):  # type: ignore[no-untyped-def]
        return iter(self._features)

    def __len__(self) -> int:
        return len(self._features)


def _to_float(name: str, values: np.ndarray, problems: list[RowProblem]) -> np.ndarray:
    # Numbers need no parsing; this fast path keeps single-event scoring cheap.
    if values.dtype.kind in "biuf":
        return values.astype(np.float64, copy=True)
    converted = to_numbers(pd.Series(values, dtype=object))
    out = converted.to_numpy(dtype=np.float64, na_value=np.nan, copy=True)
    for row in np.flatnonzero(~pd.isna(values) & np.isnan(out)):
        text = str(values[row])
        if text.strip().lower() in {"nan", ""}:
            continue
        problems.append(RowProblem(int(row), name, f"not a number: {text[:40]!r}"))
    return out


def _more(items: list[str]) -> str:
    return f" (and {len(items) - 1} more: {', '.join(items[1:4])})" if len(items) > 1 else ""
