"""The input of a Dask job, read lazily one partition at a time: a Parquet file, a folder of
Parquet files, a glob, or CSV, so no process ever holds more than a few partitions of rows.

CSV blocks are read leniently, as the local engine reads a whole file: unreadable rows are set
aside per block (:class:`Block`) and numbered as the local engine numbers them.
"""

from __future__ import annotations

import csv
import glob
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import dask
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
from dask.bytes import read_bytes

from causeline.service.errors import DataError, first_line
from causeline.service.files.rejects import (
    ROW,
    empty_rejects,
    lenient_text,
)
from causeline.service.files.tables import as_text, table_format

# How much input one partition holds, in MB: CSV text, or a Parquet table once in memory
# (measured on the file's first rows). docs/scaling.md gives what a worker needs per partition.
PARTITION_MB = 32
PROBE_ROWS = 2048  # rows read to measure a Parquet file's bytes per row in memory
MIN_PARTITION_ROWS = 1_000


def input_kind(path: Path | str) -> str:
    """``csv`` or ``parquet`` for a file, a glob or a folder (a folder means Parquet)."""
    text = str(path)
    if Path(text).is_dir():
        return "parquet"
    kind = table_format(Path(text))
    if kind == "jsonl":
        raise DataError(f"{path}: the dask engine reads CSV or Parquet; use --engine local")
    return kind


@dataclass(frozen=True)
class Block:
    """One partition as read: its readable rows, where they came from, and its rejects."""

    table: pd.DataFrame  # readable rows, index 0..n-1, ids/entities as pandas strings (as_text)
    rows: np.ndarray  # int64, per readable row its number *within the partition*
    rejects: pd.DataFrame  # rejects table as read_lenient's, `row` numbered within the partition
    span: int  # how many numbers the partition uses: the next partition starts after them


def block_offsets(spans: Sequence[int]) -> np.ndarray:
    """Per partition, the number to add to its local row numbers: the earlier partitions' spans.

    ``offset + local`` is the number the local engine gives the row: the line in a CSV input
    (header = line 1; files of a glob continue as if one file with one header), the 1-based row
    in Parquet.
    """
    spans = np.asarray(spans, dtype=np.int64)
    return np.cumsum(spans) - spans


def joined_rejects(
    rejects: Sequence[pd.DataFrame], spans: Sequence[int], columns: Sequence[str]
) -> pd.DataFrame:
    """The partitions' rejects, in input order, as one table numbered as the local engine's."""
    shifted = [
        part.assign(**{ROW: part[ROW].to_numpy(dtype=np.int64) + offset})
        for part, offset in zip(rejects, block_offsets(spans), strict=True)
        if len(part)
    ]
    return pd.concat(shifted, ignore_index=True) if shifted else empty_rejects(columns)


@dataclass(frozen=True)
class Partitions:
    """The input as delayed :class:`Block` objects in input order, its column names and kind."""

    parts: list[Any]
    columns: list[str]
    kind: str


def read_partitions(path: Path | str, text_columns: list[str],
                    partition_mb: float = PARTITION_MB) -> Partitions:
    """The input, lazily, one :class:`Block` at a time; ids stay text as in the local read.

    Partitions are bounded by size, not by how the input was written: a Parquet file is cut
    into row ranges of about ``partition_mb`` in memory whatever its row groups (a file written
    in one row group gives several partitions), and CSV into blocks of ``partition_mb`` of text.
    A CSV block is read on its own, with the file's header line, exactly as the local reader
    reads a whole file (:func:`causeline.service.files.rejects.lenient_text`): unreadable rows
    are set aside and each block infers its own column types, so a column that is empty in the
    first rows (where ``dask.dataframe.read_csv`` would guess a type for all blocks) reads as it
    does locally. Blocks end at line breaks, so cells must not hold line breaks.
    """
    if not partition_mb > 0:
        raise DataError(f"--partition-mb must be positive, not {partition_mb:g}")
    text = str(path)
    kind = input_kind(text)
    files = _files(text, kind)
    try:
        if kind == "parquet":
            return _parquet_partitions(files, text_columns, partition_mb)
        parts = []
        columns: list[str] = []
        for position, name in enumerate(files):
            with open(name, "rb") as handle:
                header = handle.readline()
            columns = columns or next(csv.reader([header.decode("utf-8-sig")]))
            size = int(partition_mb * 2**20)
            _, blocks = read_bytes(name, delimiter=b"\n", blocksize=size, sample=False)
            for number, block in enumerate(blocks[0]):
                # Only the first file's own header line takes a number (line 1): a later file
                # continues the first, and a later block gets the header only to be parsed.
                unnumbered = 0 if position == number == 0 else 1
                parts.append(dask.delayed(_csv_block)(
                    block, header if number else b"", unnumbered, text_columns, name
                ))
    except (ValueError, OSError, UnicodeDecodeError, pa.ArrowException) as exc:
        raise DataError(f"{path}: cannot be read as {kind}: {first_line(exc)}") from None
    return Partitions(parts, columns, kind)


def _files(text: str, kind: str) -> list[str]:
    """The files of a file, a glob or a folder (every Parquet file under it), in name order."""
    if Path(text).is_dir():
        files = sorted(str(p) for p in Path(text).rglob("*")
                       if p.is_file() and p.suffix.lower() in (".parquet", ".pq"))
    else:
        files = sorted(glob.glob(text)) if not Path(text).exists() else [text]
    if not files:
        raise DataError(f"{text}: no such file, folder or matching {kind} files")
    return files


def _parquet_partitions(files: list[str], text_columns: list[str], partition_mb: float
                        ) -> Partitions:
    """Row ranges of every file, each about ``partition_mb`` once read into memory."""
    parts: list[Any] = []
    columns: list[str] | None = None
    step = 0  # rows per partition, measured once on the first file with rows: same columns
    for name in files:
        handle = pq.ParquetFile(name)
        if columns is None:
            columns = list(handle.schema_arrow.names)
        elif list(handle.schema_arrow.names) != columns:
            raise DataError(f"{name}: its columns differ from {files[0]}'s")
        rows = handle.metadata.num_rows
        if not step and rows:
            step = max(MIN_PARTITION_ROWS, int(partition_mb * 2**20 / _bytes_per_row(handle)))
        for start in range(0, rows, step or 1):
            parts.append(dask.delayed(_parquet_range)(name, start, min(rows, start + step),
                                                      text_columns))
    return Partitions(parts, columns or [], "parquet")


def _bytes_per_row(handle: pq.ParquetFile) -> float:
    """A table's size in memory per row, measured on the file's first rows (strings included)."""
    batch = next(handle.iter_batches(batch_size=PROBE_ROWS, use_threads=False))
    frame = pa.Table.from_batches([batch]).to_pandas()
    return max(float(frame.memory_usage(deep=True).sum()) / max(len(frame), 1), 1.0)


def _parquet_range(name: str, start: int, stop: int, text_columns: list[str]) -> Block:
    """On a worker: rows ``[start, stop)`` of a Parquet file as a :class:`Block`, read batch by
    batch from the row groups that hold them, so no more than the range is kept."""
    handle = pq.ParquetFile(name)
    meta = handle.metadata
    sizes = np.array([meta.row_group(g).num_rows for g in range(meta.num_row_groups)])
    first_row = np.cumsum(sizes) - sizes
    groups = [g for g in range(sizes.size)
              if first_row[g] < stop and first_row[g] + sizes[g] > start]
    pieces = []
    position = int(first_row[groups[0]]) if groups else start
    for batch in handle.iter_batches(batch_size=65_536, row_groups=groups, use_threads=False):
        lo, hi = max(start - position, 0), min(stop - position, batch.num_rows)
        if hi > lo:
            pieces.append(batch.slice(lo, hi - lo))
        position += batch.num_rows
        if position >= stop:
            break
    frame = pa.Table.from_batches(pieces, schema=handle.schema_arrow).to_pandas()
    table = as_text(frame.reset_index(drop=True), text_columns)
    count = len(table)
    return Block(table, np.arange(1, count + 1, dtype=np.int64), empty_rejects(table.columns),
                 count)


def _csv_block(
    block: bytes, header: bytes, unnumbered: int, text_columns: list[str], name: str
) -> Block:
    """On a worker: one CSV block, read as
    :func:`causeline.service.files.rejects.read_lenient` reads a file.

    ``unnumbered`` leading lines of ``header + block`` (a header) take no row number.
    """
    data = header + block
    # Undecodable bytes survive as lone surrogates, so one bad byte costs one row, not the block.
    read = lenient_text(
        "csv", data.decode("utf-8", errors="surrogateescape"), text_columns, Path(name)
    )
    rejects = read.rejects.assign(**{ROW: read.rejects[ROW].to_numpy() - unnumbered})
    return Block(read.table, read.rows - unnumbered, rejects, _lines(data) - unnumbered)


def _lines(data: bytes) -> int:
    """Lines in ``data``; a last line without a line break (a file's end) counts too."""
    return data.count(b"\n") + (1 if data and not data.endswith(b"\n") else 0)


