"""The app's state: settings, keys, metrics, the registry of served bundles, the prediction
log and the batcher, and the served models a request reads once and keeps.

:meth:`Service.reload` loads every bundle off to the side and swaps one reference, so a request
in flight during a swap finishes on the bundle it started with.
"""

from __future__ import annotations

import logging
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

from causeline.service.api import heap
from causeline.service.api.auth import ApiKeys
from causeline.service.api.batcher import Batcher, Job, Scored, log_records
from causeline.service.api.bodies import LogStatus
from causeline.service.api.logwriter import BackgroundLog
from causeline.service.api.metrics import Metrics
from causeline.service.api.problems import FieldError, Problem
from causeline.service.api.registry import Model, Registry, Served
from causeline.service.api.schema import EventSchema
from causeline.service.api.settings import Settings
from causeline.service.errors import CauselineError, quoted

logger = logging.getLogger("causeline.service")


@dataclass(frozen=True)
class Current:
    """What a request reads once and keeps: the served models and their event schemas."""

    served: Served
    schemas: dict[str, EventSchema]
    # Action finders made on first use, per (model, changes): see api/changes.py.
    finders: dict[tuple[str, int], Any] = field(default_factory=dict)

    def pick(self, name: str | None) -> tuple[Model, EventSchema]:
        if name is None:
            name = self.served.default
            if name is None:
                raise invalid([FieldError(field="model", message=f"name a model: {self._names}")])
        if name not in self.served.models:
            raise invalid([FieldError(
                field="model", message=f"no model named {quoted(name)}; served: {self._names}")])
        return self.served.models[name], self.schemas[name]

    @property
    def _names(self) -> str:
        return ", ".join(sorted(self.served.models))


class Service:
    """The app's state: settings, keys, metrics, registry, prediction log and batcher."""

    def __init__(self, settings: Settings) -> None:
        self.settings = settings
        self.keys = ApiKeys.load(
            settings.api_keys, settings.api_keys_file, settings.admin_without_keys
        )
        self.metrics = Metrics()
        self.registry = Registry(settings.bundle, settings.default_model)
        self.batcher = Batcher(settings.batch_rows, self.metrics.batch_rows.observe,
                               self.record_scored)
        folder = settings.prediction_log_folder
        self.log = None if folder is None else BackgroundLog(
            folder, self.metrics, settings.prediction_log_queue,
            settings.prediction_log_fsync_seconds,
        )
        self.current: Current | None = None

    def reload(self) -> tuple[Served | None, Served]:
        """Load every bundle off to the side and swap; raises (old set kept) on failure."""
        previous = self.current.served if self.current else None
        try:
            served = self.registry.reload()
        except Exception as exc:
            self.metrics.bundle_failures.inc()
            logger.error("bundle load refused: %s", self.registry.status.error,
                         exc_info=not isinstance(exc, CauselineError))
            raise
        reject = self.settings.unknown_fields == "reject"
        schemas = {name: EventSchema(m.bundle, reject) for name, m in served.models.items()}
        self.current = Current(served, schemas)  # the atomic swap: one reference
        # The bundles are here for good: out of the collector's full passes (see heap.py).
        heap.settle()
        self.metrics.set_models(served.versions())
        if previous is not None:
            self.metrics.reloads.inc()
        logger.info("serving %s", ", ".join(f"{n} {v}" for n, v in served.versions().items()))
        return previous, served

    def record_scored(self, model: Model, jobs: Sequence[Job], outcomes: Sequence[Scored]) -> None:
        """Count and log one explained batch's events; refused requests are neither."""
        events: list[Any] = []
        results: list[dict[str, Any]] = []
        for job, outcome in zip(jobs, outcomes, strict=True):
            if not outcome.errors:
                events += job.events
                results += outcome.records
        if not results:
            return
        codes = [reason["code"] for result in results for reason in result["reasons"]]
        self.metrics.count_scored(model.name, len(results), codes,
                                  sum(result["probability"] for result in results))
        if self.log is not None:
            self.log.submit(log_records(model, events, results))

    def log_status(self) -> LogStatus:
        if self.log is None:
            return LogStatus(status="off")
        return LogStatus(
            status="failing" if self.log.failing else "ok", folder=str(self.log.folder),
            error=self.log.error, written=self.log.written, dropped=self.log.dropped,
        )


def invalid(errors: list[FieldError]) -> Problem:
    return Problem(422, f"{len(errors)} invalid field(s) in the request", "invalid-request", errors)
