"""Feeds the prediction log from a background thread, so a request never waits on the disk.

Rule when logging cannot keep up or the disk fails: scoring goes on. Records that do not fit the
bounded queue are dropped and counted (``causeline_prediction_log_dropped_records{reason="queue
full"}``); a failed write drops its records, counts an error, marks the log as failing in
readiness, and the next batch tries again with a fresh segment. Lines are fsynced every
``fsync_seconds`` and at shutdown; the record format is :mod:`causeline.service.files.predlog`'s.
"""

from __future__ import annotations

import contextlib
import logging
import threading
import time
from collections import deque
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from causeline.service.api.metrics import Metrics
from causeline.service.files.predlog import PredictionLogWriter, render_lines

LINGER_SECONDS = 0.1
WAKE_RECORDS = 1024

logger = logging.getLogger("causeline.service")


class BackgroundLog:
    """A bounded queue of records and the thread that appends them."""

    def __init__(
        self, folder: Path, metrics: Metrics, capacity: int = 100_000,
        fsync_seconds: float = 1.0,
    ) -> None:
        self.folder = Path(folder)
        self.metrics = metrics
        self.capacity = capacity
        self.fsync_seconds = fsync_seconds
        self.error: str | None = None
        self.written = 0
        self.dropped = 0
        self._queue: deque[str] = deque()  # rendered lines, a request's records each
        self._pending = 0
        self._condition = threading.Condition()
        self._stopping = False
        self._writer: PredictionLogWriter | None = None
        self._thread = threading.Thread(target=self._run, name="prediction-log", daemon=True)
        # Read when metrics are scraped, not set on every request.
        metrics.log_queue.set_function(lambda: self._pending)

    @property
    def failing(self) -> bool:
        return self.error is not None

    def start(self) -> None:
        self._thread.start()

    def submit(self, records: Sequence[Mapping[str, Any]]) -> bool:
        """Queue ``records`` without blocking; False (and counted) when the queue is full.

        They are rendered here, so the queue holds one string per request rather than the
        events' objects: holding those until the writer's next turn cost the serving loop
        more (memory it could not reuse, more garbage collection) than rendering them.
        """
        lines = render_lines(records)
        with self._condition:
            if self._stopping or self._pending + len(records) > self.capacity:
                self.dropped += len(records)
                reason = "stopped" if self._stopping else "queue full"
                self.metrics.log_dropped.labels(reason).inc(len(records))
                return False
            self._queue.append(lines)
            self._pending += len(records)
            # Waking the writer for every request makes it fight the event loop for the GIL;
            # it drains on its own every LINGER_SECONDS, or now when the queue grows large.
            if self._pending >= WAKE_RECORDS:
                self._condition.notify()
            return True

    def stop(self, timeout: float = 10.0) -> None:
        """Write what is queued, fsync and close."""
        with self._condition:
            self._stopping = True
            self._condition.notify()
        if self._thread.is_alive():
            self._thread.join(timeout)

    def _run(self) -> None:
        last_sync = time.monotonic()
        while True:
            with self._condition:
                if not self._stopping:
                    self._condition.wait(min(self.fsync_seconds, LINGER_SECONDS))
                pending, count = "".join(self._queue), self._pending
                self._queue.clear()
                self._pending = 0
                stopping = self._stopping
            if pending:
                self._write(pending, count)
            if stopping or time.monotonic() - last_sync >= self.fsync_seconds:
                self._sync()
                last_sync = time.monotonic()
            if stopping:
                self._close()
                return

    def _write(self, lines: str, records: int) -> None:
        try:
            if self._writer is None:
                self._writer = PredictionLogWriter(self.folder)
            self._writer.append_lines(lines)
            self.written += records
            self.metrics.log_written.inc(records)
            if self.error is not None:
                logger.info("prediction log %s: writing again", self.folder)
            self.error = None
        except (OSError, ValueError) as exc:
            self._fail(exc)
            self.dropped += records
            self.metrics.log_dropped.labels("write failed").inc(records)

    def _sync(self) -> None:
        if self._writer is None:
            return
        try:
            self._writer.sync()
        except (OSError, ValueError) as exc:
            self._fail(exc)

    def _close(self) -> None:
        if self._writer is None:
            return
        try:
            self._writer.close()
        except (OSError, ValueError) as exc:
            self._fail(exc)

    def _fail(self, exc: Exception) -> None:
        message = f"{type(exc).__name__}: {exc}"
        if self.error != message:
            logger.error("prediction log %s: %s; scoring goes on", self.folder, message)
        self.error = message
        self.metrics.log_errors.inc()
        writer, self._writer = self._writer, None
        if writer is not None:
            # The handle is being dropped anyway; the next write opens a new segment.
            with contextlib.suppress(OSError, ValueError):
                writer.close()
