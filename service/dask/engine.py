"""The Dask engine: the batch jobs spread over a Dask cluster, one partition at a time.

Input is read lazily with ``dask.dataframe`` (a Parquet file, a folder of Parquet files, a glob,
or CSV), so no process ever holds more than a few partitions of rows. Workers receive the
bundle's *path*, never a model: each worker loads and verifies the bundle once
(:func:`worker_explainer`) and keeps it, so the path must be readable on every worker (a
shared volume). Without a scheduler address a :class:`~distributed.LocalCluster` is started for
the run and closed at its end.

CSV blocks are read leniently, as the local engine reads a whole file: unreadable rows are set
aside per block (:class:`Block`) and numbered as the local engine numbers them.

``explain`` streams each partition's output to the file in input order, keeping at most
:data:`AHEAD` partitions in flight. Rows are explained the same way as by the local engine
(the same :class:`~service.explain.Explainer`, row by row independent), so contributions agree
exactly.
"""

from __future__ import annotations

import csv
import glob
import gzip
import json
from collections import Counter, deque
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from functools import lru_cache
from pathlib import Path
from typing import Any

import dask
import dask.dataframe as dd
import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
from dask.bytes import read_bytes
from distributed import Client, LocalCluster

from causeline.service.bundle.load import Bundle, load_bundle
from causeline.service.errors import CauselineError, DataError, first_line
from causeline.service.explain.explainer import Explainer
from causeline.service.explain.records import explanation_frame, explanation_records
from causeline.service.files.rejects import (
    ROW,
    empty_rejects,
    lenient_text,
    rejects_path,
    write_rejects,
)
from causeline.service.files.spreadsheet import escape_frame
from causeline.service.files.storage import atomic_file
from causeline.service.files.tables import as_text, table_format

# A LocalCluster sized for a small machine: two single-threaded worker processes (LightGBM and
# numba are not re-entrant-friendly with many threads per process, and processes sidestep the
# GIL). The limit is per worker; Dask spills and then pauses a worker that nears it.
LOCAL_WORKERS = 2
LOCAL_MEMORY_LIMIT = "2GiB"
CONNECT_TIMEOUT = 10  # seconds to reach a given scheduler before giving up
# Partitions explained ahead of the one being written: enough to keep every worker busy.
AHEAD = 2 * LOCAL_WORKERS
CSV_BLOCK = "64MiB"


@dataclass(frozen=True)
class DaskSettings:
    """Where to run: a scheduler address, or a LocalCluster started for the run."""

    scheduler: str | None = None
    processes: bool = True
    workers: int = LOCAL_WORKERS
    memory_limit: str = LOCAL_MEMORY_LIMIT
    timeout: float | None = None  # seconds; None: CONNECT_TIMEOUT


@contextmanager
def dask_client(settings: DaskSettings | None = None) -> Iterator[Client]:
    """A client for the given scheduler, or for a LocalCluster that lives as long as the block."""
    settings = settings or DaskSettings()
    if settings.scheduler:
        timeout = settings.timeout or CONNECT_TIMEOUT
        try:
            client = Client(settings.scheduler, timeout=timeout, set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            reason = first_line(exc)
            raise CauselineError(
                f"cannot reach the Dask scheduler at {settings.scheduler} "
                f"within {timeout:g} s ({reason})"
            ) from None
        with client:
            yield client
        return
    with LocalCluster(
        n_workers=settings.workers, threads_per_worker=1, processes=settings.processes,
        memory_limit=settings.memory_limit, dashboard_address=":0",
    ) as cluster, Client(cluster, set_as_default=False) as client:
        yield client


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
    reads a whole file (:func:`service.rejects.lenient_text`): unreadable rows are set aside and
    each block infers its own column types, so a column that is empty in the first rows (where
    ``dask.dataframe.read_csv`` would guess a type for all blocks) reads as it does locally.
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
    """On a worker: one CSV block read as :func:`service.rejects.read_lenient` reads a file.

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


@lru_cache(maxsize=4)
def worker_explainer(bundle_path: str, top_k: int | None = None) -> Explainer:
    """The bundle at ``bundle_path``, loaded and verified once per worker process and kept."""
    return Explainer(load_bundle(Path(bundle_path)), top_k=top_k)


def stream_ordered(
    client: Client, tasks: list[Any], consume: Callable[[int, Any], None], ahead: int = AHEAD
) -> None:
    """Compute ``tasks`` on the cluster and hand results to ``consume`` in order, a few at once.

    Only ``ahead`` results exist at any time, so the client and the workers hold a bounded number
    of partitions however long the input is.
    """
    pending: deque[Any] = deque()
    position = 0
    for task in tasks:
        pending.append(client.compute(task))
        if len(pending) >= ahead:
            consume(position, _result(pending.popleft()))
            position += 1
    while pending:
        consume(position, _result(pending.popleft()))
        position += 1


def _result(future: Any) -> Any:
    try:
        return future.result()
    except CauselineError:
        raise
    except (ValueError, OSError) as exc:
        raise DataError(f"unreadable input partition: {first_line(exc)}") from None
    finally:
        future.release()


@dataclass
class ExplainTotals:
    """What the command prints after an explain run: counts, not rows."""

    rows: int = 0
    flagged: int = 0
    warned: int = 0
    leading: Counter[str] = field(default_factory=Counter)
    rejected: int = 0


@dataclass(frozen=True)
class _Explained:
    """What a worker sends back for one partition: its output, counts and rejects."""

    output: Any  # a frame, or JSON lines as text
    rows: int
    flagged: int
    warned: int
    leading: Counter[str]
    rejects: pd.DataFrame
    span: int


def _explain_part(
    block: Block, bundle_path: str, top: int | None, all_contributions: bool, kind: str
) -> _Explained:
    """On a worker: one partition's output and its counts; its rejects are passed on."""
    explainer = worker_explainer(bundle_path, top)
    bundle = explainer.bundle
    explanation = explainer.explain(block.table)  # ids already text (read_partitions)
    threshold = bundle.manifest.decision.threshold
    names = bundle.spec.feature_names
    if kind == "jsonl":
        records = explanation_records(explanation, threshold, names, all_contributions)
        out: Any = "".join(json.dumps(r, ensure_ascii=False) + "\n" for r in records)
    else:
        frame = explanation_frame(
            explanation, threshold, names, explainer.top_k, all_contributions
        )
        out = escape_frame(frame) if kind == "csv" else frame
    leading = Counter(
        reasons[0].code
        for reasons, flagged in zip(explanation.reasons, explanation.decision, strict=True)
        if reasons and flagged
    )
    warned = sum(1 for w in explanation.warnings if w)
    return _Explained(out, len(explanation.ids), int(explanation.decision.sum()), warned, leading,
                      block.rejects, block.span)


def explain_partitions(
    bundle: Bundle,
    input_path: Path | str,
    out: Path,
    top: int | None = None,
    all_contributions: bool = False,
    settings: DaskSettings | None = None,
) -> ExplainTotals:
    """``causeline explain --engine dask``: the same output file, written partition by partition.

    Unreadable rows are set aside per partition and written, numbered as the local engine numbers
    them, to the same rejects file beside the output (empty when nothing was rejected).
    """
    out = Path(out)
    kind = table_format(out)
    source = read_partitions(input_path, [bundle.spec.id])
    bundle_path = str(Path(bundle.path).resolve())
    totals = ExplainTotals()
    rejects: list[pd.DataFrame] = []
    spans: list[int] = []
    with dask_client(settings) as client, atomic_file(out) as temporary:
        writer = _PartWriter(temporary, kind, out.name.lower().endswith(".gz"))
        try:
            tasks = [
                dask.delayed(_explain_part)(part, bundle_path, top, all_contributions, kind)
                for part in source.parts
            ]

            def consume(_: int, result: _Explained) -> None:
                writer.write(result.output)
                totals.rows += result.rows
                totals.flagged += result.flagged
                totals.warned += result.warned
                totals.leading.update(result.leading)
                rejects.append(result.rejects)
                spans.append(result.span)

            stream_ordered(client, tasks, consume)
        finally:
            writer.close()
    joined = joined_rejects(rejects, spans, source.columns)
    write_rejects(joined, rejects_path(out))
    totals.rejected = len(joined)
    return totals


class _PartWriter:
    """Appends partitions to one CSV, JSON-lines or Parquet file."""

    def __init__(self, path: Path, kind: str, gz: bool) -> None:
        self.kind = kind
        self.first = True
        self.parquet: pq.ParquetWriter | None = None
        self.schema: pa.Schema | None = None
        self.path = path
        self.handle: Any = None
        self.held: pd.DataFrame | None = None
        if kind != "parquet":
            opener = gzip.open if gz else open
            self.handle = opener(path, "wt", encoding="utf-8", newline="")

    def write(self, part: Any) -> None:
        if self.kind != "jsonl" and len(part) == 0:
            # A partition whose rows were all rejected has columns without types, which would
            # fix a wrong Parquet schema; it is written only if no partition has rows.
            self.held = part if self.held is None else self.held
            return
        self._append(part)

    def _append(self, part: Any) -> None:
        if self.kind == "jsonl":
            self.handle.write(part)
        elif self.kind == "csv":
            part.to_csv(self.handle, index=False, header=self.first)
        else:
            if self.parquet is None:
                self.schema = _typed_schema(pa.Schema.from_pandas(part, preserve_index=False))
                self.parquet = pq.ParquetWriter(self.path, self.schema)
            table = pa.Table.from_pandas(part, schema=self.schema, preserve_index=False)
            self.parquet.write_table(table)
        self.first = False

    def close(self) -> None:
        if self.first and self.held is not None:
            self._append(self.held)
        if self.handle is not None:
            self.handle.close()
        if self.parquet is not None:
            self.parquet.close()
        elif self.kind == "parquet":
            # No partitions at all: still leave a readable (empty) file.
            pq.write_table(pa.table({}), self.path)


def _typed_schema(schema: pa.Schema) -> pa.Schema:
    """Columns that are all empty in the first partition get the type later ones will have."""
    fields = []
    for item in schema:
        if pa.types.is_null(item.type):
            kind = pa.float64() if item.name.endswith("_contribution") else pa.string()
            item = item.with_type(kind)
        fields.append(item)
    return pa.schema(fields, metadata=schema.metadata)
