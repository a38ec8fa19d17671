"""Time windows over events: ``--since``/``--until`` read as UTC times, and the rows inside."""

from __future__ import annotations

import numpy as np
import pandas as pd

from causeline.service.errors import DataError


def parse_time(text: str | None, option: str) -> pd.Timestamp | None:
    """A ``--since``/``--until`` value as a UTC time; dates without a zone are taken as UTC."""
    if text is None:
        return None
    try:
        stamp = pd.Timestamp(text)
    except (ValueError, TypeError):
        raise DataError(f"{option} {text!r} is not a date or time") from None
    if pd.isna(stamp):
        raise DataError(f"{option} {text!r} is not a date or time")
    return stamp.tz_localize("UTC") if stamp.tzinfo is None else stamp.tz_convert("UTC")


def utc_times(table: pd.DataFrame, column: str | None) -> pd.Series:
    """A column read as UTC times, NaT where there is no such column or a value is no time."""
    if column is None or column not in table.columns:
        return pd.Series(pd.NaT, index=table.index, dtype="datetime64[ns, UTC]")
    return pd.to_datetime(table[column], errors="coerce", utc=True, format="mixed")


def window_mask(
    times: pd.Series, since: pd.Timestamp | None, until: pd.Timestamp | None, column: str | None
) -> np.ndarray:
    """Rows with ``since <= time < until`` (half-open, so back-to-back windows never overlap)."""
    keep = np.ones(len(times), dtype=bool)
    if since is None and until is None:
        return keep
    if column is None:
        raise DataError("--since/--until need a time column, and the bundle's spec names none")
    if times.isna().all():
        raise DataError(f"--since/--until: column {column!r} holds no readable times")
    if since is not None:
        keep &= (times >= since).fillna(False).to_numpy(dtype=bool)
    if until is not None:
        keep &= (times < until).fillna(False).to_numpy(dtype=bool)
    return keep
