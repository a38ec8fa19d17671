"""Reading and writing tables by file suffix: CSV, JSON lines or Parquet."""

from __future__ import annotations

import io
import math
import sys
from collections.abc import Iterable
from pathlib import Path

import numpy as np
import pandas as pd

from causeline.service.errors import DataError, first_line
from causeline.service.files.storage import atomic_file

_CSV = (".csv", ".csv.gz", ".txt")
_JSONL = (".jsonl", ".ndjson", ".jsonl.gz")
_PARQUET = (".parquet", ".pq")
SUFFIXES = _CSV + _JSONL + _PARQUET
LARGEST = sys.float_info.max  # the largest float64: integers past it cannot become one


def table_format(path: Path) -> str:
    """``csv``, ``jsonl`` or ``parquet`` from the file name; a clear error otherwise."""
    name = Path(path).name.lower()
    for kind, suffixes in (("csv", _CSV), ("jsonl", _JSONL), ("parquet", _PARQUET)):
        if name.endswith(suffixes):
            return kind
    raise DataError(f"{path}: unknown table format; use one of {', '.join(SUFFIXES)}")


def read_table(path: Path, text_columns: Iterable[str] = ()) -> pd.DataFrame:
    """Read a whole table; ``text_columns`` (ids, say) are kept as text, never as numbers."""
    path = Path(path)
    kind = table_format(path)
    if not path.is_file():
        raise DataError(f"{path}: no such file")
    return parse_table(kind, path, text_columns, path)


def parse_table(
    kind: str, source: Path | io.StringIO, text_columns: Iterable[str], where: Path
) -> pd.DataFrame:
    """Parse a file or an in-memory text as ``kind``; errors name ``where`` in one line."""
    text = {column: "string" for column in text_columns}
    try:
        if kind == "csv":
            frame = pd.read_csv(source, dtype=text or None, encoding="utf-8")
        elif kind == "jsonl":
            frame = pd.read_json(source, lines=True, dtype=text or None)
        else:
            frame = pd.read_parquet(source)
    except UnicodeDecodeError as exc:
        raise DataError(f"{where}: not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    except (ValueError, OSError, pd.errors.ParserError) as exc:
        raise DataError(f"{where}: cannot be read as {kind}: {first_line(exc)}") from None
    return as_text(frame, text)


def as_text(frame: pd.DataFrame, columns: Iterable[str]) -> pd.DataFrame:
    """``columns`` (ids, entities) as pandas strings, never as numbers."""
    for column in columns:
        if column in frame.columns:
            frame[column] = frame[column].astype("string")
    return frame


def write_table(frame: pd.DataFrame, path: Path) -> None:
    """Write atomically in the format the suffix names."""
    path = Path(path)
    kind = table_format(path)
    # The temporary name hides the suffix, so compression is named explicitly.
    compression = "gzip" if path.name.lower().endswith(".gz") else None
    with atomic_file(path) as temporary:
        if kind == "csv":
            frame.to_csv(temporary, index=False, encoding="utf-8", compression=compression)
        elif kind == "jsonl":
            frame.to_json(
                temporary, orient="records", lines=True, force_ascii=False, compression=compression
            )
        else:
            frame.to_parquet(temporary, index=False)


_TRUE = frozenset({"1", "1.0", "true", "yes"})
_FALSE = frozenset({"0", "0.0", "false", "no"})


def to_numbers(values: pd.Series) -> pd.Series:
    """``pd.to_numeric(values, errors="coerce")``, with integers past float64's range as +-inf.

    A JSON document or a CSV cell can hold an integer of any size; pandas raises
    ``OverflowError`` on one too large for a float instead of coercing it. As infinity it meets
    the same rule as any other infinite value wherever it is read.
    """
    try:
        return pd.to_numeric(values, errors="coerce")
    except OverflowError:
        return pd.to_numeric(values.map(_bounded), errors="coerce")


def _bounded(value: object) -> object:
    if isinstance(value, int) and not isinstance(value, bool) and abs(value) > LARGEST:
        return math.inf if value > 0 else -math.inf
    return value


def binary_column(column: pd.Series, name: str, role: str) -> np.ndarray:
    """A 0/1, true/false or yes/no column as booleans; anything else stops, naming the value."""
    if column.isna().any():
        raise DataError(f"column {name!r} ({role}) has missing values")
    text = column.astype("string").str.strip().str.lower()
    positive = text.isin(_TRUE).to_numpy(dtype=bool)
    bad = ~(positive | text.isin(_FALSE).to_numpy(dtype=bool))
    if bad.any():
        # Values as the file shows them (2, not np.int64(2)), with the values the column holds.
        example = str(column.iloc[int(np.flatnonzero(bad)[0])])
        held = sorted({str(v) for v in column.unique()[:1000]}, key=lambda v: (len(v), v))
        shown = ", ".join(held[:6]) + (", ..." if len(held) > 6 else "")
        raise DataError(f"column {name!r} ({role}) is not binary (0/1, true/false or yes/no): "
                        f"found {example} (the column holds {shown})")
    return positive
