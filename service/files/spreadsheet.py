"""Spreadsheet-safe text cells (OWASP, "CSV Injection").

A cell that begins with ``=``, ``+``, ``-``, ``@``, a tab or a carriage return can be run as a
formula when a CSV is opened in a spreadsheet; OWASP's guidance is to prefix such cells with a
single quote. Only text columns are touched: a negative number stays a number.
"""

from __future__ import annotations

import pandas as pd

DANGEROUS_PREFIXES = ("=", "+", "-", "@", "\t", "\r")


def escape_cell(value: str) -> str:
    return "'" + value if value.startswith(DANGEROUS_PREFIXES) else value


def escape_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """A copy with every text cell escaped."""
    out = frame.copy()
    for column in out.columns:
        series = out[column]
        if pd.api.types.is_object_dtype(series.dtype) or pd.api.types.is_string_dtype(
            series.dtype
        ):
            out[column] = series.map(lambda v: escape_cell(v) if isinstance(v, str) else v)
    return out
