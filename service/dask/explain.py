"""``causeline explain --engine dask``: the explain job over partitions on a Dask cluster.

It streams each partition's output to the file in input order, keeping at most
:data:`~causeline.service.dask.cluster.AHEAD` partitions in flight. Rows are explained and
rendered as by the local engine (the same
:class:`~causeline.service.explain.explainer.Explainer`, rows independent, and
:func:`~causeline.service.explain.job.rendered`), so contributions agree exactly.
"""

from __future__ import annotations

import functools
import gzip
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import dask
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from causeline.service.actions.search import ActionFinder, Actions
from causeline.service.bundle.load import Bundle
from causeline.service.dask.cluster import (
    DaskSettings,
    dask_client,
    stream_ordered,
    worker_explainer,
)
from causeline.service.dask.partitions import Block, joined_rejects, read_partitions
from causeline.service.explain.job import ExplainTotals, rendered
from causeline.service.files.rejects import (
    rejects_path,
    write_rejects,
)
from causeline.service.files.storage import atomic_file
from causeline.service.files.tables import table_format


@dataclass(frozen=True)
class _Explained:
    """What a worker sends back for one partition: its output, counts and rejects."""

    output: Any  # a frame, or JSON lines as text
    totals: ExplainTotals
    rejects: pd.DataFrame
    span: int


@functools.cache
def _worker_finder(bundle_path: str, max_changes: int) -> ActionFinder:
    """The what-to-change search for the worker's bundle, made once per worker process."""
    return ActionFinder(worker_explainer(bundle_path).bundle, max_changes)


def _explain_part(
    block: Block, bundle_path: str, top: int | None, all_contributions: bool, kind: str,
    max_changes: int | None = None,
) -> _Explained:
    """On a worker: one partition's output and its counts; its rejects are passed on."""
    explainer = worker_explainer(bundle_path, top)
    explanation = explainer.explain(block.table)  # ids already text (read_partitions)
    totals = ExplainTotals()
    totals.add(explanation)
    changes = None if not max_changes else Actions.find(
        explainer, explanation, max_changes, _worker_finder(bundle_path, max_changes))
    return _Explained(rendered(explanation, explainer, kind, all_contributions, changes),
                      totals, block.rejects, block.span)


def explain_partitions(
    bundle: Bundle,
    input_path: Path | str,
    out: Path,
    top: int | None = None,
    all_contributions: bool = False,
    settings: DaskSettings | None = None,
    max_changes: int | None = None,
) -> ExplainTotals:
    """``causeline explain --engine dask``: the same output file, written partition by partition.

    Unreadable rows are set aside per partition and written, numbered as the local engine numbers
    them, to the same rejects file beside the output (empty when nothing was rejected).
    """
    out = Path(out)
    kind = table_format(out)
    settings = settings or DaskSettings()
    source = read_partitions(input_path, [bundle.spec.id], settings.partition_mb)
    bundle_path = str(Path(bundle.path).resolve())
    totals = ExplainTotals()
    rejects: list[pd.DataFrame] = []
    spans: list[int] = []
    with dask_client(settings) as client, atomic_file(out) as temporary:
        writer = _PartWriter(temporary, kind, out.name.lower().endswith(".gz"))
        try:
            tasks = [
                dask.delayed(_explain_part)(part, bundle_path, top, all_contributions, kind,
                                            max_changes)
                for part in source.parts
            ]

            def consume(_: int, result: _Explained) -> None:
                writer.write(result.output)
                totals.rows += result.totals.rows
                totals.flagged += result.totals.flagged
                totals.warned += result.totals.warned
                totals.leading.update(result.totals.leading)
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
