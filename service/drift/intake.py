"""The window of recent events, read in chunks so memory stays bounded.

A table (CSV, JSON lines, Parquet) or the service's prediction log; ``--since``/``--until`` pick
rows by the spec's time column (a table) or by the time each event was logged (the log). A
prediction log may hold several models: only entries of the bundle's model are read.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
from pydantic_core import from_json

from causeline.service.bundle.load import Bundle
from causeline.service.errors import DataError, first_line
from causeline.service.files.predlog import SEGMENT_GLOB, is_prediction_log
from causeline.service.files.tables import as_text, table_format
from causeline.service.files.window import utc_times, window_mask

CHUNK_ROWS = 50_000
LOG_TIME = "log_logged_at"


@dataclass
class Source:
    """Where the window comes from, and what reading it set aside."""

    path: Path
    from_log: bool
    time_column: str | None
    since: pd.Timestamp | None = None
    until: pd.Timestamp | None = None
    read: int = 0  # rows read before the window
    unreadable: int = 0  # log lines that were not an event
    other_models: int = 0  # log entries of other models


def open_source(bundle: Bundle, path: Path, since: pd.Timestamp | None,
                until: pd.Timestamp | None) -> Source:
    path = Path(path)
    if is_prediction_log(path):
        return Source(path, True, LOG_TIME, since, until)
    if path.is_dir():
        raise DataError(f"{path}: a folder without prediction-log segments ({SEGMENT_GLOB})")
    if not path.is_file():
        raise DataError(f"{path}: no such file")
    table_format(path)
    return Source(path, False, bundle.spec.time, since, until)


def chunks(bundle: Bundle, source: Source, text: list[str]) -> Iterator[pd.DataFrame]:
    """The window's rows, ``CHUNK_ROWS`` at a time; ``text`` columns are read as text."""
    raw = _log_chunks(bundle, source) if source.from_log else _table_chunks(source, text)
    for frame in raw:
        source.read += len(frame)
        frame = as_text(frame, text)
        if source.since is not None or source.until is not None:
            times = utc_times(frame, source.time_column)
            frame = frame[window_mask(times, source.since, source.until, source.time_column)]
        if len(frame):
            yield frame.reset_index(drop=True)


def _table_chunks(source: Source, text: list[str]) -> Iterator[pd.DataFrame]:
    kind = table_format(source.path)
    try:
        if kind == "parquet":
            for batch in pq.ParquetFile(source.path).iter_batches(batch_size=CHUNK_ROWS):
                yield batch.to_pandas()
        elif kind == "csv":
            dtype = dict.fromkeys(text, "string")
            yield from pd.read_csv(source.path, chunksize=CHUNK_ROWS, dtype=dtype or None,
                                   encoding="utf-8")
        else:
            yield from pd.read_json(source.path, lines=True, chunksize=CHUNK_ROWS)
    except UnicodeDecodeError as exc:
        raise DataError(f"{source.path}: not UTF-8 text ({exc.reason})") from None
    except (ValueError, OSError, pd.errors.ParserError) as exc:
        raise DataError(f"{source.path}: cannot be read as {kind}: {first_line(exc)}") from None


def _log_chunks(bundle: Bundle, source: Source) -> Iterator[pd.DataFrame]:
    """Entries of the bundle's model: the event's fields plus ``log_logged_at``, skipping lines
    that are not an event (counted) and a last line cut off by a crash."""
    rows: list[dict[str, object]] = []
    name = bundle.name
    for segment in sorted(source.path.glob(SEGMENT_GLOB)):
        with open(segment, encoding="utf-8", errors="replace") as handle:
            for line in handle:
                if not line.endswith("\n"):
                    break
                try:
                    record = from_json(line)
                except ValueError:
                    record = None
                event = record.get("event") if isinstance(record, dict) else None
                if not isinstance(event, dict):
                    source.unreadable += 1
                    continue
                if record.get("model") != name:
                    source.other_models += 1
                    continue
                event[LOG_TIME] = record.get("logged_at")
                rows.append(event)
                if len(rows) >= CHUNK_ROWS:
                    yield pd.DataFrame(rows)
                    rows = []
    if rows:
        yield pd.DataFrame(rows)
