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
import dask.dataframe as dd
import numpy as np
import pandas as pd
from dask.bytes import read_bytes

from causeline.service.errors import DataError, first_line
from causeline.service.files.rejects import (
    ROW,
    empty_rejects,
    lenient_text,
)
from causeline.service.files.tables import as_text, table_format

CSV_BLOCK = "64MiB"


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


def read_partitions(path: Path | str, text_columns: list[str]) -> Partitions:
    """The input, lazily, one :class:`Block` at a time; ids stay text as in the local read.

    A CSV block is read on its own, with the file's header line, exactly as the local reader
    reads a whole file (:func:`causeline.service.files.rejects.lenient_text`): unreadable rows are
    set aside and each block infers its own column types, so a column that is empty in the first
    rows (where ``dask.dataframe.read_csv`` would guess a type for all blocks) reads as it does
    locally.
    Blocks end at line breaks, so cells must not hold line breaks.
    """
    text = str(path)
    kind = input_kind(text)
    files = sorted(glob.glob(text)) if not Path(text).exists() else [text]
    if not files:
        raise DataError(f"{path}: no such file, folder or matching files")
    try:
        if kind == "parquet":
            # Plain object strings, as pandas reads them locally: the features come out the same.
            with dask.config.set({"dataframe.convert-string": False}):
                frame = dd.read_parquet(files if len(files) > 1 else files[0])
            parts: list[Any] = [
                dask.delayed(_parquet_block)(part, text_columns)
                for part in frame.to_delayed(optimize_graph=True)
            ]
            return Partitions(parts, list(frame.columns), kind)
        parts = []
        columns: list[str] = []
        for position, name in enumerate(files):
            with open(name, "rb") as handle:
                header = handle.readline()
            columns = columns or next(csv.reader([header.decode("utf-8-sig")]))
            _, blocks = read_bytes(name, delimiter=b"\n", blocksize=CSV_BLOCK, sample=False)
            for number, block in enumerate(blocks[0]):
                # Only the first file's own header line takes a number (line 1): a later file
                # continues the first, and a later block gets the header only to be parsed.
                unnumbered = 0 if position == number == 0 else 1
                parts.append(dask.delayed(_csv_block)(
                    block, header if number else b"", unnumbered, text_columns, name
                ))
    except (ValueError, OSError, UnicodeDecodeError) as exc:
        raise DataError(f"{path}: cannot be read as {kind}: {first_line(exc)}") from None
    return Partitions(parts, columns, kind)


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


def _parquet_block(frame: pd.DataFrame, text_columns: list[str]) -> Block:
    """On a worker: one Parquet partition as a :class:`Block`; Parquet has no broken rows."""
    table = as_text(frame.reset_index(drop=True), text_columns)
    count = len(table)
    return Block(table, np.arange(1, count + 1, dtype=np.int64), empty_rejects(table.columns),
                 count)
