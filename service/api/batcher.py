"""Scoring requests, batched: concurrent requests for the same model share one explain call.

Explaining eight events costs little more than explaining one (the per-call overhead of building
features dominates), so while one batch is being explained, requests that arrive wait and are then
explained together. Nothing waits on purpose: an idle server explains a lone request at once.
Rows are independent in :meth:`~causeline.service.explain.explainer.Explainer.explain`, so each
request's slice of a batch equals what it would get alone.
"""

from __future__ import annotations

import asyncio
import logging
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from starlette.concurrency import run_in_threadpool

from causeline.service.api.problems import FieldError
from causeline.service.api.registry import Model
from causeline.service.api.schema import EventSchema, event_id
from causeline.service.explain.records import explanation_records

INLINE_ROWS = 64

logger = logging.getLogger("causeline.service")


@dataclass
class Job:
    """One request's events, waiting for a batch."""

    model: Model
    schema: EventSchema
    events: Sequence[Mapping[str, Any]]
    ids: list[str]
    all_contributions: bool
    future: asyncio.Future[Scored]


@dataclass(frozen=True)
class Scored:
    """One request's outcome: result records, or the field errors that refuse it."""

    records: list[dict[str, Any]]
    errors: list[FieldError]


ScoredHook = Callable[[Model, Sequence[Job], Sequence[Scored]], None]


class Batcher:
    """Queues jobs and explains them in batches of up to ``max_rows`` events, one at a time.

    ``observe`` is told each batch's number of events; ``scored`` gets each explained batch's
    jobs and outcomes before their requests resume (the service counts and logs them there,
    once per batch rather than once per request).
    """

    def __init__(
        self, max_rows: int = 64, observe: Callable[[float], None] | None = None,
        scored: ScoredHook | None = None,
    ) -> None:
        self.max_rows = max_rows
        self._observe = observe
        self._scored = scored
        self._pending: list[Job] = []
        self._running = False
        self._loop: asyncio.AbstractEventLoop | None = None
        self._task: asyncio.Task[None] | None = None  # kept so it is not collected mid-run

    async def score(
        self, model: Model, schema: EventSchema, events: Sequence[Mapping[str, Any]],
        all_contributions: bool,
    ) -> Scored:
        loop = asyncio.get_running_loop()
        if loop is not self._loop:  # a new event loop (tests start several): start afresh
            self._loop, self._pending, self._running = loop, [], False
        ids = [event_id(event, schema.id_field, position) for position, event in enumerate(events)]
        job = Job(model, schema, events, ids, all_contributions, loop.create_future())
        self._pending.append(job)
        if not self._running:
            self._running = True
            self._task = loop.create_task(self._drain())
        return await job.future

    async def _drain(self) -> None:
        try:
            while self._pending:
                # Let requests that have already arrived join this batch.
                await asyncio.sleep(0)
                batch = self._take()
                rows = sum(len(job.events) for job in batch)
                if self._observe is not None:
                    self._observe(rows)
                try:
                    if rows <= INLINE_ROWS:
                        # A thread would wait for the GIL (up to its 5 ms switch interval)
                        # while the loop runs: small batches cost less explained right here.
                        outcomes = explain_jobs(batch)
                    else:
                        outcomes = await run_in_threadpool(explain_jobs, batch)
                except Exception as exc:  # handed to each request's own error handling
                    for job in batch:
                        if not job.future.done():
                            job.future.set_exception(exc)
                    continue
                if self._scored is not None:
                    try:
                        self._scored(batch[0].model, batch, outcomes)
                    except Exception:  # counting or logging never costs a client its answer
                        logger.exception("recording a scored batch failed")
                for job, outcome in zip(batch, outcomes, strict=True):
                    if not job.future.done():
                        job.future.set_result(outcome)
        finally:
            self._running = False

    def _take(self) -> list[Job]:
        """The first job, plus later jobs for the same model while they fit in ``max_rows``."""
        first = self._pending[0]
        batch, rest, rows = [first], [], len(first.events)
        for job in self._pending[1:]:
            if job.model is first.model and rows + len(job.events) <= self.max_rows:
                batch.append(job)
                rows += len(job.events)
            else:
                rest.append(job)
        self._pending = rest
        return batch


def explain_jobs(jobs: Sequence[Job]) -> list[Scored]:
    """Explain every job's events in one call and split the result back per job."""
    model, schema = jobs[0].model, jobs[0].schema
    events = [event for job in jobs for event in job.events]
    ids = [i for job in jobs for i in job.ids]
    explanation = model.explainer.explain_features(
        model.bundle.builder.transform_records(events), ids)
    threshold = model.bundle.manifest.decision.threshold
    names = model.bundle.spec.feature_names
    problems = explanation.features.problems
    out, start = [], 0
    for job in jobs:
        stop = start + len(job.events)
        mine = [p for p in problems if start <= p.row < stop]
        if mine:
            out.append(Scored([], schema.problem_errors(mine, offset=start)))
        else:
            out.append(Scored(explanation_records(
                explanation, threshold, names, job.all_contributions, range(start, stop)
            ), []))
        start = stop
    return out


def log_records(
    model: Model, events: Sequence[Mapping[str, Any]], results: Sequence[Mapping[str, Any]]
) -> list[dict[str, Any]]:
    """Prediction-log records (the format of :mod:`causeline.service.files.predlog`)."""
    logged_at = datetime.now(UTC).isoformat(timespec="milliseconds")
    name, version = model.name, model.version
    return [
        {
            "logged_at": logged_at,
            "model": name,
            "version": version,
            "id": result["id"],
            "probability": result["probability"],
            "decision": result["decision"],
            "reasons": [reason["code"] for reason in result["reasons"]],
            "event": event,  # read-only from here on: the log renders it as it is
        }
        for event, result in zip(events, results, strict=True)
    ]
