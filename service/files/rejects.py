"""Batch inputs read leniently: rows that cannot be used are set aside with a reason, not fatal.

A nightly job should not lose a whole file to one broken line, and it must not lose the line
silently either. :func:`read_lenient` reads a CSV, JSON-lines or Parquet table and returns the
rows it could read plus a *rejects* table: one row per unusable input row with ``row`` (its line
in a CSV or JSON-lines file, header = line 1; its 1-based position in a Parquet file), ``reason``
and the original cells. Broken lines (a wrong number of fields, not JSON) and bytes that are not
UTF-8 are caught here, per row (:func:`lenient_text` does the same for text already read, such as
one block of a large file); a cell of the wrong type is caught later by the feature builder
(:attr:`causeline.service.features.builder.FeatureMatrix.problems`) and moved over with
:func:`add_rejects`. A missing column stays a whole-file error: no row could be right.
"""

from __future__ import annotations

import csv
import gzip
import io
import json
import re
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from causeline.service.errors import DataError, RowProblem
from causeline.service.files.spreadsheet import escape_frame
from causeline.service.files.tables import (
    SUFFIXES,
    binary_column,
    parse_table,
    read_table,
    table_format,
    write_table,
)

ROW = "row"
REASON = "reason"
# Text that could not be split into columns: surplus CSV fields, a line that is not JSON.
UNPARSED = "unparsed"
_BOM = "\ufeff"
_KEEP = 2000  # characters of an unparsed line kept in the rejects file
_SURROGATE = re.compile("[\udc80-\udcff]")


@dataclass(frozen=True)
class Lenient:
    """The readable rows (index 0..n-1), each row's number in the source, and the rejects."""

    table: pd.DataFrame
    rows: np.ndarray
    rejects: pd.DataFrame

    @property
    def rows_read(self) -> int:
        """Every data row of the input, readable or not."""
        return len(self.table) + len(self.rejects)


def read_lenient(path: Path, text_columns: Iterable[str] = ()) -> Lenient:
    """Read a table as :func:`~causeline.service.files.tables.read_table` does, setting
    unreadable rows aside."""
    path = Path(path)
    text = list(text_columns)
    kind = table_format(path)
    if kind == "parquet" or not path.is_file():
        table = read_table(path, text)  # no lines to break; a clear error if the file is absent
        return Lenient(table, np.arange(1, len(table) + 1), empty_rejects(table.columns))
    data = path.read_bytes()
    if path.name.lower().endswith(".gz"):
        try:
            data = gzip.decompress(data)
        except (OSError, EOFError) as exc:
            raise DataError(f"{path}: not a readable gzip file ({exc})") from None
    # Undecodable bytes survive as lone surrogates, so one bad byte costs one row, not the file.
    return lenient_text(kind, data.decode("utf-8", errors="surrogateescape"), text, path)


def lenient_text(kind: str, text: str, text_columns: Iterable[str], where: Path) -> Lenient:
    """CSV or JSON-lines text (undecodable bytes as lone surrogates) read as :func:`read_lenient`
    reads a file: ``rows`` are line numbers in ``text``, header = line 1; errors name ``where``.
    """
    text = text.removeprefix(_BOM)
    columns = list(text_columns)
    scan = _scan_csv(text, where) if kind == "csv" else _scan_jsonl(text)
    # Text without rejects is parsed as given, so a clean input reads exactly as a clean file;
    # otherwise only the readable lines are parsed.
    table = _parse(kind, scan.good_text if scan.rejects else text, columns, where)
    if len(table) != len(scan.rows):
        raise DataError(f"{where}: {len(table)} rows parsed but {len(scan.rows)} lines were read")
    return Lenient(table, np.asarray(scan.rows, dtype=np.int64),
                   _reject_frame(scan.rejects, scan.header or list(table.columns)))


def empty_rejects(columns: Iterable[str] = ()) -> pd.DataFrame:
    return pd.DataFrame(columns=[ROW, REASON, *[c for c in columns if c not in (ROW, REASON)]])


def cell_reasons(problems: Iterable[RowProblem]) -> dict[int, str]:
    """Feature-builder problems as one reason per row position (``column: message; ...``)."""
    out: dict[int, list[str]] = {}
    for problem in problems:
        out.setdefault(problem.row, []).append(f"{problem.column}: {problem.message}")
    return {row: "; ".join(messages) for row, messages in out.items()}


def label_reasons(column: pd.Series, name: str) -> dict[int, str]:
    """Rows whose label is missing or not binary, read as :func:`binary_column` reads labels."""
    missing = column.isna().to_numpy()
    bad_values: set[object] = set()
    for value in column[~missing].unique():  # few distinct labels: check each once
        try:
            binary_column(pd.Series([value]), name, "label")
        except DataError:
            bad_values.add(value)
    bad = ~missing & column.isin(bad_values).to_numpy()
    out = {int(row): f"{name}: label is missing" for row in np.flatnonzero(missing)}
    for row in np.flatnonzero(bad):
        value = str(column.iloc[row])[:40]
        out[int(row)] = f"{name}: label {value!r} is not 0/1, true/false or yes/no"
    return out


def merge_reasons(*reasons: Mapping[int, str]) -> dict[int, str]:
    out: dict[int, str] = {}
    for part in reasons:
        for row, reason in part.items():
            out[row] = f"{out[row]}; {reason}" if row in out else reason
    return out


def add_rejects(
    rejects: pd.DataFrame, table: pd.DataFrame, rows: np.ndarray, reasons: Mapping[int, str]
) -> pd.DataFrame:
    """``rejects`` plus the rows of ``table`` at the positions in ``reasons``, cells as is."""
    if not reasons:
        return rejects
    positions = sorted(reasons)
    picked = table.iloc[positions].astype(object).reset_index(drop=True)
    picked.insert(0, REASON, [reasons[p] for p in positions])
    picked.insert(0, ROW, np.asarray(rows)[positions])
    if rejects.empty:
        return picked
    return pd.concat([rejects, picked], ignore_index=True).sort_values(ROW, kind="stable")


def keep_mask(length: int, reasons: Mapping[int, str]) -> np.ndarray:
    """True for positions not in ``reasons``."""
    keep = np.ones(length, dtype=bool)
    keep[list(reasons)] = False
    return keep


def write_rejects(rejects: pd.DataFrame, path: Path) -> None:
    """Write the rejects as a UTF-8 CSV, formula-looking cells escaped (people open this one)."""
    write_table(escape_frame(rejects.reset_index(drop=True)), path)


def rejects_path(out: Path) -> Path:
    """``scores.rejects.csv`` beside ``scores.csv`` (or ``.parquet``, ``.jsonl``, ...)."""
    out = Path(out)
    name = out.name
    lowered = name.lower()
    for suffix in sorted(SUFFIXES, key=len, reverse=True):
        if lowered.endswith(suffix):
            name = name[: -len(suffix)]
            break
    return out.with_name(f"{name}.rejects.csv")


@dataclass
class _Scan:
    header: list[str] | None
    good_text: str
    rows: list[int]
    rejects: list[tuple[int, str, dict[str, str]]]


def _scan_csv(text: str, path: Path) -> _Scan:
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        header = next(reader)
    except StopIteration:
        raise DataError(f"{path}: the file is empty") from None
    except csv.Error as exc:
        raise DataError(f"{path}: cannot read the header line ({exc})") from None
    if any(_undecodable(cell) is not None for cell in header):
        raise DataError(f"{path}: the header line is not UTF-8 text")
    good = io.StringIO()
    writer = csv.writer(good, lineterminator="\n")
    writer.writerow(header)
    rows: list[int] = []
    rejects: list[tuple[int, str, dict[str, str]]] = []
    last = reader.line_num
    check_encoding = _SURROGATE.search(text) is not None
    while True:
        start = last + 1
        try:
            record = next(reader)
        except StopIteration:
            break
        except csv.Error as exc:
            last = reader.line_num
            rejects.append((start, f"unreadable line: {exc}", {}))
            continue
        last = reader.line_num
        if not record:
            continue  # a blank line, skipped as pandas skips it
        reason = _encoding_reason(record, header) if check_encoding else None
        if reason is None and len(record) != len(header):
            reason = f"broken line: {len(record)} fields where the header has {len(header)}"
        if reason is not None:
            rejects.append((start, reason, _cells(record, header)))
            continue
        writer.writerow(record)
        rows.append(start)
    return _Scan(header, good.getvalue(), rows, rejects)


def _scan_jsonl(text: str) -> _Scan:
    good: list[str] = []
    rows: list[int] = []
    rejects: list[tuple[int, str, dict[str, str]]] = []
    for number, line in enumerate(text.split("\n"), start=1):
        if not line.strip():
            continue
        position = _undecodable(line)
        if position is not None:
            reason = f"not UTF-8 text (byte 0x{_byte(line, position):02x})"
            rejects.append((number, reason, {UNPARSED: _readable(line)[:_KEEP]}))
            continue
        try:
            record = json.loads(line)
        except json.JSONDecodeError as exc:
            rejects.append((number, f"broken line: not JSON ({exc.msg})",
                            {UNPARSED: line[:_KEEP]}))
            continue
        if not isinstance(record, dict):
            rejects.append((number, "broken line: not a JSON object", {UNPARSED: line[:_KEEP]}))
            continue
        huge = next((name for name, value in record.items() if _out_of_range(value)), None)
        if huge is not None:
            # pandas' JSON reader would refuse the whole file over this one number.
            rejects.append((number, f"{huge}: integer out of range (beyond 64 bits)",
                            {UNPARSED: line[:_KEEP]}))
            continue
        good.append(line)
        rows.append(number)
    return _Scan(None, "\n".join(good) + ("\n" if good else ""), rows, rejects)


def _out_of_range(value: object) -> bool:
    return (isinstance(value, int) and not isinstance(value, bool)
            and not -(2**63) <= value < 2**64)


def _parse(kind: str, text: str, text_columns: list[str], path: Path) -> pd.DataFrame:
    """The readable rows, parsed with the same reader and types as a clean file."""
    if kind != "csv" and not text:
        return pd.DataFrame()
    return parse_table(kind, io.StringIO(text), text_columns, path)


def _reject_frame(
    rejects: list[tuple[int, str, dict[str, str]]], columns: list[str]
) -> pd.DataFrame:
    if not rejects:
        return empty_rejects(columns)
    records = [{ROW: row, REASON: reason, **cells} for row, reason, cells in rejects]
    extra = [UNPARSED] if any(UNPARSED in cells for _, _, cells in rejects) else []
    return pd.DataFrame(records, columns=[ROW, REASON, *columns, *extra])


def _encoding_reason(record: list[str], header: list[str]) -> str | None:
    for position, cell in enumerate(record):
        offset = _undecodable(cell)
        if offset is not None:
            where = header[position] if position < len(header) else f"field {position + 1}"
            return f"not UTF-8 text (byte 0x{_byte(cell, offset):02x} in {where!r})"
    return None


def _cells(record: list[str], header: list[str]) -> dict[str, str]:
    cells = {name: _readable(value) for name, value in zip(header, record, strict=False)}
    if len(record) > len(header):
        cells[UNPARSED] = ",".join(_readable(v) for v in record[len(header):])[:_KEEP]
    return cells


def _undecodable(text: str) -> int | None:
    """Position of the first byte that was not UTF-8 (a lone surrogate), else None."""
    match = _SURROGATE.search(text)
    return None if match is None else match.start()


def _byte(text: str, position: int) -> int:
    return ord(text[position]) - 0xDC00


def _readable(text: str) -> str:
    """Text with undecodable bytes shown as U+FFFD, safe to write as UTF-8."""
    return text.encode("utf-8", errors="surrogateescape").decode("utf-8", errors="replace")
