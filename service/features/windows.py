"""Look-back window aggregates over sorted per-entity logs, without a loop per snapshot.

Rows are sorted by (entity code, time). A window is a half-open row range ``[lo, hi)`` inside
one entity's rows; sums come from per-entity cumulative sums (restarting at each entity, so a
window's value depends only on its own entity's rows up to ``hi``), minima and maxima from one
``reduceat`` over all windows.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from pandas.api.indexers import BaseIndexer

from causeline.service.spec.timeline import Aggregation


def rank(
    codes: np.ndarray, times: np.ndarray, query_codes: np.ndarray, query_times: np.ndarray,
    inclusive: bool,
) -> np.ndarray:
    """For each query (entity, time): how many rows sort before it in (entity, time) order.

    ``inclusive`` counts rows at exactly the query time as before it (time <= t), else not.
    One lexsort over rows and queries together: exact for integer and float times alike.
    """
    n = codes.size
    all_codes = np.concatenate([codes, query_codes])
    all_times = np.concatenate([times, query_times])
    # Ties on time: queries sort after rows when inclusive, before them otherwise.
    flag = np.concatenate(
        [np.zeros(n, dtype=np.int8), np.full(query_codes.size, 1 if inclusive else -1, np.int8)]
    )
    order = np.lexsort((flag, all_times, all_codes))
    is_row = order < n
    rows_before = np.cumsum(is_row) - is_row
    out = np.empty(query_codes.size, dtype=np.int64)
    out[order[~is_row] - n] = rows_before[~is_row]
    return out


def group_cumsum(codes: np.ndarray, columns: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """Cumulative sums restarting at each entity (rows sorted by entity), all columns at once."""
    if not columns:
        return {}
    if codes.size == 0 or codes[0] == codes[-1]:
        # One entity (the online path): a plain running sum, in the same order as pandas'.
        return {name: np.cumsum(values, dtype=np.float64) for name, values in columns.items()}
    # Column by column: a table of every column at once would hold three copies of it.
    grouper = pd.Series(codes)
    return {name: pd.Series(values, dtype=np.float64).groupby(grouper, sort=False).cumsum()
            .to_numpy() for name, values in columns.items()}


def window_sum(cumulative: np.ndarray, lo: np.ndarray, hi: np.ndarray, start: np.ndarray
               ) -> np.ndarray:
    """Sum over rows ``[lo, hi)`` from per-entity cumulative sums; ``start`` is the entity's first
    row."""
    empty = hi <= lo
    upper = cumulative[np.maximum(hi - 1, 0)]
    lower = np.where(lo > start, cumulative[np.maximum(lo - 1, 0)], 0.0)
    return np.where(empty, 0.0, upper - lower)


def window_extreme(values: np.ndarray, lo: np.ndarray, hi: np.ndarray, kind: str) -> np.ndarray:
    """Minimum or maximum over ``[lo, hi)`` ignoring missing values (NaN if none)."""
    if lo.size == 0:
        return np.empty(0)
    padded = np.append(values, np.nan)
    bounds = np.empty(2 * lo.size, dtype=np.int64)
    bounds[0::2] = lo
    bounds[1::2] = hi
    ufunc = np.fmin if kind == "min" else np.fmax
    # reduceat over interleaved bounds: even slots are the windows, odd slots the gaps between.
    reduced = ufunc.reduceat(padded, bounds)[0::2]
    return np.where(hi > lo, reduced, np.nan)


def last_valid_index(codes: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """Per row, the position of the latest valid row of the same entity at or before it, or -1.

    ``valid`` may be one column or several (rows x columns); the result has the same shape.
    """
    rows = np.arange(valid.shape[0])
    positions = np.where(valid, rows if valid.ndim == 1 else rows[:, None], -1)
    if codes.size == 0 or codes[0] == codes[-1]:
        return np.maximum.accumulate(positions, axis=0)
    frame = pd.DataFrame(positions.reshape(valid.shape[0], -1))
    out = frame.groupby(codes, sort=False).cummax().to_numpy(dtype=np.int64)
    return out.reshape(positions.shape)


class Prefix:
    """Per-entity running sums of every measurement, shared by all windows.

    ``clock`` is the row time in the unit slopes are per, measured from the entity's first row
    so the sums stay small; ``squares`` names the measurements whose standard deviation is
    wanted (all when not given). Values are centred on the entity's first valid value, so variances
    do not cancel away; both centres are fixed by the past only.
    """

    def __init__(
        self, codes: np.ndarray, values: dict[str, np.ndarray], clock: np.ndarray,
        limits: dict[str, set[tuple[str, float]]], slopes: set[str],
        squares: set[str] | None = None,
    ) -> None:
        self.codes, self.values = codes, values
        columns: dict[str, np.ndarray] = {}
        self.first: dict[str, np.ndarray] = {}
        for name, x in values.items():
            valid = ~np.isnan(x)
            first = _first_valid(codes, x, valid)
            self.first[name] = first
            centred = np.where(valid, x - first, 0.0)
            columns.update({(name, "n"): valid, (name, "x"): centred})  # type: ignore[dict-item]
            if squares is None or name in squares:  # only std needs sums of squares
                columns[(name, "xx")] = centred * centred  # type: ignore[index]
            if name in slopes:
                t = np.where(valid, clock, 0.0)
                columns.update({(name, "t"): t, (name, "tt"): t * t,  # type: ignore[dict-item]
                                (name, "tx"): t * centred})
            for side, limit in sorted(limits.get(name, ())):
                beyond = x > limit if side == "above" else x < limit
                columns[(name, side, limit)] = valid & beyond  # type: ignore[index]
        self.sums = group_cumsum(codes, columns)  # type: ignore[arg-type]
        present = [~np.isnan(x) for x in values.values()]
        latest = last_valid_index(codes, np.column_stack(present)) if present else None
        self._latest = {name: latest[:, i] for i, name in enumerate(values)}  # type: ignore[index]

    def aggregate(
        self, name: str, lo: np.ndarray, hi: np.ndarray, start: np.ndarray,
        wanted: list[tuple[Aggregation, float | None]],
    ) -> list[np.ndarray]:
        """Each wanted aggregation of measurement ``name`` over the windows ``[lo, hi)``."""
        def total(*kind: object) -> np.ndarray:
            return window_sum(self.sums[(name, *kind)], lo, hi, start)  # type: ignore[index]

        n, sx = total("n"), total("x")
        out: list[np.ndarray] = []
        with np.errstate(invalid="ignore", divide="ignore"):
            mean_centred = sx / n
            for kind, limit in wanted:
                if kind == "mean":
                    centre = self.first[name][np.maximum(hi - 1, 0)]
                    out.append(np.where(n > 0, mean_centred + centre, np.nan))
                elif kind == "std":
                    # Sample standard deviation (ddof=1), as pandas and most tools report it.
                    squares = total("xx") - sx * mean_centred
                    out.append(np.where(n > 1, np.sqrt(np.clip(squares, 0.0, None) / (n - 1)),
                                        np.nan))
                elif kind == "slope":
                    # Least-squares slope of value on time: Sxy / Sxx about the window means.
                    st, stt = total("t"), total("tt")
                    sxy = total("tx") - st * sx / n
                    sxx = stt - st * st / n
                    usable = (n > 1) & (sxx > 1e-12 * np.maximum(stt, 1.0))
                    out.append(np.where(usable, sxy / np.where(usable, sxx, 1.0), np.nan))
                elif kind == "count":
                    out.append(n.astype(np.float64))
                elif kind in ("count_above", "count_below"):
                    side = kind.removeprefix("count_")
                    out.append(np.where(hi > lo, total(side, limit), np.nan))
                elif kind in ("min", "max"):
                    out.append(window_extreme(self.values[name], lo, hi, kind))
                elif kind == "vs_median":
                    median = window_median(self.values[name], lo, hi)
                    out.append(self.last(name, lo, hi) - median)
                else:  # last
                    out.append(self.last(name, lo, hi))
        return out

    def valid_count(self, name: str, lo: np.ndarray, hi: np.ndarray, start: np.ndarray
                    ) -> np.ndarray:
        """Valid readings of ``name`` in each window ``[lo, hi)``."""
        return window_sum(self.sums[(name, "n")], lo, hi, start)  # type: ignore[index]

    def last(self, name: str, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
        """The latest valid value of ``name`` in each window (NaN if none)."""
        latest = self._latest[name][np.maximum(hi - 1, 0)]
        ok = (hi > lo) & (latest >= lo)
        return np.where(ok, self.values[name][np.maximum(latest, 0)], np.nan)


class _Bounds(BaseIndexer):
    """Window bounds given as arrays, for pandas' rolling machinery."""

    def get_window_bounds(self, num_values: int = 0, min_periods: int | None = None,
                          center: bool | None = None, closed: str | None = None,
                          step: int | None = None) -> tuple[np.ndarray, np.ndarray]:
        return self.lo, self.hi  # type: ignore[attr-defined]


def window_median(values: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Median of the valid values in each window ``[lo, hi)`` (NaN if none).

    pandas' rolling median over explicit bounds: a sorted skip list that slides with the
    windows, O(log w) per row added or dropped, since windows of rows sorted by (entity, time)
    only move forward.
    """
    windows = lo.size
    if windows == 0:
        return np.empty(0)
    # pandas wants one window per value: pad the shorter side (NaN values count as absent).
    size = max(values.size, windows)
    padded = np.full(size, np.nan)
    padded[:values.size] = values
    lo_all = np.full(size, lo[-1], dtype=np.int64)
    hi_all = np.full(size, hi[-1], dtype=np.int64)
    lo_all[:windows], hi_all[:windows] = lo, np.maximum(hi, lo)
    rolled = pd.Series(padded).rolling(_Bounds(lo=lo_all, hi=hi_all), min_periods=1).median()
    return rolled.to_numpy()[:windows]


def _first_valid(codes: np.ndarray, x: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """Each row's entity's first valid value (NaN where the entity has none)."""
    if codes.size == 0:
        return x.copy()
    if codes[0] == codes[-1]:
        found = np.flatnonzero(valid)
        return np.full(x.size, x[found[0]] if found.size else np.nan)
    return pd.Series(x).groupby(codes, sort=False).transform("first").to_numpy()
