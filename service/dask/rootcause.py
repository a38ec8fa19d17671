"""``rootcause --engine dask``: the root-cause job with every per-event step on the workers.

The client never holds per-event data, so its memory follows the number of groups and the
bounded samples below, not the size of the input:

1. per partition, a worker reads the rows, sets bad rows aside, applies the time window,
   selects the events (labelled, or scored at or above the threshold) and explains only those.
   The explained events stay on the workers (Dask keeps them, spilling to disk under memory
   pressure); the client receives counts, rejected rows and two bounded samples: feature rows
   for the fix simulation and cause mixes for the fit;
2. the client fits HDBSCAN on the sample of at most :data:`SAMPLE_SIZE` events with a cause,
   with ``prediction_data`` kept; the workers place the other events into its groups with
   ``hdbscan.approximate_predict`` and tally each partition's share of every group's
   description (:mod:`causeline.service.rootcause.tally`), which the client adds up in input order;
3. the workers simulate each group's fix on their events, and write nothing: the client
   streams each partition's rows of event_groups.csv into the output in input order.

When every event with a cause fits in the sample, the fit is the local engine's fit on the same
events in the same order, so the groups are identical. The smallest group scales with the
sample: the size the local engine would use for all events, times the sampled share.

Samples are drawn without knowing the total: each row gets a seeded random key and the rows
with the smallest keys win (a bottom-k sample), so one pass suffices and each partition sends
at most k rows.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import dask
import hdbscan
import numpy as np
import pandas as pd

from causeline.service.bundle.load import Bundle
from causeline.service.dask.cluster import (
    AHEAD,
    DaskSettings,
    dask_client,
    stream_ordered,
    worker_explainer,
)
from causeline.service.dask.partitions import Block, joined_rejects, read_partitions
from causeline.service.errors import DataError
from causeline.service.files.predlog import is_prediction_log
from causeline.service.files.rejects import REASON, ROW
from causeline.service.rootcause.fix import Target
from causeline.service.rootcause.grouping import (
    UNGROUPED,
    GroupFinder,
    cause_mix,
    default_min_cluster_size,
)
from causeline.service.rootcause.intake import EventInput, event_times, screen_rows, window_mask
from causeline.service.rootcause.job import (
    STEPS,
    Grouping,
    RootCauseOptions,
    RootCauseResult,
    SelectedEvents,
    finish_rootcause,
    quiet,
    start_rootcause,
)
from causeline.service.rootcause.tally import (
    SEED,
    EventSlice,
    Tally,
    avoidable_in_slice,
    event_frame,
    tally_slice,
)

# HDBSCAN's fit grows faster than linearly with points; on the demo 13,000 events fit in about
# 3 s on one core, 50,000 in well under a minute. Measured on the demo, grouping a sample of
# half to two thirds of the events moves border events between groups and noise (ARI 0.82-0.95
# against the fit on all), so the sample is made as large as one core handles comfortably.
SAMPLE_SIZE = 50_000
# Rows the fix simulation fits its co-driver lines on (slopes, means, ranges): a uniform sample
# this large pins them down to well under a per cent.
REFERENCE_SIZE = 200_000
# A sampled fit never asks for groups smaller than this (HDBSCAN with min_samples 3).
SAMPLED_MIN_GROUP = 5


@dataclass(frozen=True)
class _Sample:
    """A bottom-k sample: keys, where each row came from (partition, position) and the rows."""

    keys: np.ndarray
    part: np.ndarray
    position: np.ndarray
    rows: np.ndarray

    @staticmethod
    def of(keys: np.ndarray, rows: np.ndarray, part: int, k: int) -> _Sample:
        chosen = np.sort(np.argsort(keys, kind="stable")[:k])
        return _Sample(keys[chosen], np.full(chosen.size, part), chosen, rows[chosen])

    @staticmethod
    def merge(samples: list[_Sample], k: int, width: int) -> _Sample:
        """The k smallest keys over all samples, back in input order."""
        if not samples:
            return _Sample(np.zeros(0), np.zeros(0, int), np.zeros(0, int), np.zeros((0, width)))
        keys = np.concatenate([s.keys for s in samples])
        part = np.concatenate([s.part for s in samples])
        position = np.concatenate([s.position for s in samples])
        rows = np.vstack([s.rows for s in samples])
        chosen = np.argsort(keys, kind="stable")[:k]
        chosen = chosen[np.lexsort((position[chosen], part[chosen]))]
        return _Sample(keys[chosen], part[chosen], position[chosen], rows[chosen])


@dataclass(frozen=True)
class _Selected:
    """One partition after step 1: its events (kept on the worker) and what the client needs."""

    events: EventSlice
    summary: _Summary


@dataclass(frozen=True)
class _Summary:
    """What one partition sends to the client after step 1: counts, rejects and samples."""

    span: int
    rows: int
    kept: int
    events: int
    rejects: pd.DataFrame
    reference: _Sample
    mixes: _Sample
    with_cause: int


def _select_part(
    block: Block, index: int, bundle_path: str, options: RootCauseOptions, since: Any,
    until: Any, reference_size: int, sample_size: int,
) -> _Selected:
    """On a worker: one partition through steps 1-3 of the local job."""
    explainer = worker_explainer(bundle_path)
    bundle = explainer.bundle
    spec = bundle.spec
    table = block.table  # ids and entities already text (read_partitions)
    source = EventInput(table, spec.id, spec.time, False, block.rows, block.rejects)
    times = event_times(source)
    window = window_mask(times, since, until, spec.time) if len(table) else np.ones(0, bool)
    table, times = table[window], times[window]
    screened = screen_rows(bundle, table, block.rows[window], block.rejects, options.predicted)
    table, times = table[screened.keep], times[screened.keep]
    selected = screened.selected
    events = table[selected].reset_index(drop=True)
    explanation = explainer.explain(events)
    rng = np.random.default_rng([SEED, index])
    reference_keys = rng.random(len(screened.reference))
    event_keys = rng.random(len(events))
    mix, has_cause = cause_mix(explanation.code_contributions)
    caused = np.flatnonzero(has_cause)
    mixes = _Sample.of(event_keys[caused], mix[caused], index, sample_size)
    mixes = replace(mixes, position=caused[mixes.position])
    part = EventSlice(
        index=index, events=events, times=times[selected].reset_index(drop=True),
        explanation=explanation, keys=event_keys, entity=spec.entity,
        labels=np.full(len(events), -1, dtype=np.int64), strength=np.zeros(len(events)),
    )
    summary = _Summary(
        span=block.span, rows=len(block.table) + len(block.rejects), kept=len(table),
        events=len(events), rejects=screened.rejects,
        reference=_Sample.of(reference_keys, screened.reference, index, reference_size),
        mixes=mixes, with_cause=int(caused.size),
    )
    return _Selected(part, summary)


def _summary_of(selected: _Selected) -> _Summary:
    return selected.summary


def _label_part(
    selected: _Selected, sampled: tuple[np.ndarray, np.ndarray, np.ndarray],
    clusterer: hdbscan.HDBSCAN | None,
) -> EventSlice:
    """On a worker: the sample's labels for its events here, prediction for the others."""
    part = selected.events
    labels = np.full(len(part), -1, dtype=np.int64)
    strength = np.zeros(len(part))
    positions, fitted, weights = sampled
    labels[positions], strength[positions] = fitted, weights
    mix, has_cause = cause_mix(part.explanation.code_contributions)
    rest = np.flatnonzero(has_cause)
    rest = rest[~np.isin(rest, positions)]
    if clusterer is not None and rest.size:
        assigned, weight = hdbscan.approximate_predict(clusterer, mix[rest])
        labels[rest] = np.asarray(assigned, np.int64)
        strength[rest] = np.where(labels[rest] >= 0, weight, 0.0)
    return replace(part, labels=labels, strength=strength)


def _tally_part(part: EventSlice, groups: int, bundle_path: str) -> Tally:
    return tally_slice(part, groups, worker_explainer(bundle_path).catalogue)


def _avoidable_part(
    part: EventSlice, bundle_path: str, targets: list[list[Target]], reference: np.ndarray
) -> np.ndarray:
    return avoidable_in_slice(worker_explainer(bundle_path).bundle, part, targets, reference)


def run_rootcause_dask(
    bundle: Bundle,
    events_path: Path | str,
    out: Path,
    options: RootCauseOptions | None = None,
    settings: DaskSettings | None = None,
    progress=quiet,  # type: ignore[no-untyped-def]
    sample_size: int = SAMPLE_SIZE,
    reference_size: int = REFERENCE_SIZE,
) -> RootCauseResult:
    """The root-cause job on a Dask cluster; the same outputs as the local engine."""
    options = options or RootCauseOptions()
    out = Path(out)
    start = start_rootcause(out, options)
    if Path(events_path).is_dir() and is_prediction_log(Path(events_path)):
        raise DataError(f"{events_path}: a prediction log is read by --engine local only")
    spec = bundle.spec
    source = read_partitions(events_path, [c for c in (spec.id, spec.entity) if c])
    if spec.id not in source.columns:
        raise DataError(f"{events_path}: no id column {spec.id!r}")
    bundle_path = str(Path(bundle.path).resolve())
    width = len(spec.feature_names)
    progress(f"step 1-3/{STEPS}: reading, selecting and explaining events "
             f"({len(source.parts)} partition{'s' if len(source.parts) != 1 else ''})")
    with dask_client(settings) as client:
        # Step 1's results stay on the workers; only their summaries come here.
        selected = [
            client.compute(dask.delayed(_select_part)(
                part, index, bundle_path, options, start.since, start.until, reference_size,
                sample_size,
            ))
            for index, part in enumerate(source.parts)
        ]
        gathered = _Gathered(sample_size, reference_size, width, len(
            worker_explainer(bundle_path).catalogue.codes))
        stream_ordered(client, [dask.delayed(_summary_of)(f) for f in selected],
                       lambda _, summary: gathered.add(summary))
        selection = gathered.selection(source.columns, bundle.spec.time)
        mixes, with_cause = gathered.mixes, gathered.with_cause
        progress(f"step 4/{STEPS}: clustering {gathered.events:,} events")
        finder, parameters = _fit(mixes, with_cause, options, sample_size)
        remote = client.scatter(finder.clusterer_, broadcast=True) if (
            finder.clusterer_ is not None and with_cause > mixes.keys.size) else None
        labelled = [
            client.compute(dask.delayed(_label_part)(
                future, _sampled_in(mixes, finder, index), remote,
            ))
            for index, future in enumerate(selected)
        ]
        del selected  # the labelled slices replace them on the workers
        groups = int(finder.labels_.max(initial=-1)) + 1
        tally: Tally | None = None

        def add(_: int, part: Tally) -> None:
            nonlocal tally
            tally = part if tally is None else tally.add(part)

        stream_ordered(client, [dask.delayed(_tally_part)(f, groups, bundle_path)
                                for f in labelled], add)
        assert tally is not None or not labelled
        grouping = Grouping(groups, parameters, tally or _empty_tally(groups, bundle_path))
        slices = _DaskSlices(client, labelled, bundle_path, selection.reference)
        return finish_rootcause(
            bundle, Path(events_path), out, options, start, selection, grouping, slices, progress
        )


class _DaskSlices:
    """Steps 5 and 6 over the labelled partitions on the cluster."""

    def __init__(
        self, client: Any, parts: list[Any], bundle_path: str, reference: np.ndarray
    ) -> None:
        self.client = client
        self.parts = parts
        self.bundle_path = bundle_path
        self.reference = reference

    def avoidable(self, targets: list[list[Target]]) -> np.ndarray:
        total = np.zeros(len(targets))
        if not any(targets):
            return total
        reference = self.client.scatter(self.reference, broadcast=True)

        def add(_: int, part: np.ndarray) -> None:
            total[:] += part

        stream_ordered(self.client, [
            dask.delayed(_avoidable_part)(f, self.bundle_path, targets, reference)
            for f in self.parts
        ], add)
        return total

    def event_frames(self, group_ids: list[str]) -> Iterator[pd.DataFrame]:
        frames: list[pd.DataFrame] = []
        tasks = [dask.delayed(event_frame)(f, group_ids, UNGROUPED) for f in self.parts]
        # A few partitions ahead at a time: each frame is written and dropped before the next.
        for start in range(0, len(tasks), AHEAD):
            stream_ordered(self.client, tasks[start:start + AHEAD],
                           lambda _, frame: frames.append(frame))
            yield from frames
            frames.clear()


def _fit(
    mixes: _Sample, with_cause: int, options: RootCauseOptions, sample_size: int
) -> tuple[GroupFinder, dict[str, Any]]:
    """HDBSCAN on the sample: the local engine's fit when the sample holds every event."""
    parameters: dict[str, Any] = {"engine": "dask", "sample_size": sample_size, "seed": SEED}
    if with_cause <= sample_size:
        finder = GroupFinder(min_cluster_size=options.min_group_size).fit(mixes.rows)
        parameters.update(min_cluster_size=finder.min_cluster_size_,
                          min_samples=finder.min_samples_, sampled_events=int(mixes.keys.size))
        return finder, parameters
    full = options.min_group_size or default_min_cluster_size(with_cause)
    scaled = max(SAMPLED_MIN_GROUP, round(full * sample_size / with_cause))
    finder = GroupFinder(min_cluster_size=scaled).fit(mixes.rows)
    parameters.update(min_cluster_size=full, min_samples=finder.min_samples_,
                      sampled_events=int(mixes.keys.size), sample_min_cluster_size=scaled)
    return finder, parameters


def _sampled_in(
    mixes: _Sample, finder: GroupFinder, index: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The fit's labels and strengths of the sampled events of partition ``index``."""
    here = mixes.part == index
    return mixes.position[here], finder.labels_[here], finder.strength_[here]


class _Gathered:
    """The partitions' summaries added up as they arrive: counts, rejects, running samples.

    Only the bounded samples and one span per partition are kept, so what the client holds
    does not grow with the number of events (rejected rows excepted: they are output).
    """

    def __init__(self, sample_size: int, reference_size: int, width: int, codes: int) -> None:
        self.sample_size, self.reference_size = sample_size, reference_size
        self.reference = _Sample.merge([], reference_size, width)
        self.mixes = _Sample.merge([], sample_size, codes)
        self.rejects: list[pd.DataFrame] = []
        self.spans: list[int] = []
        self.rows = self.kept = self.events = self.with_cause = 0

    def add(self, summary: _Summary) -> None:
        self.reference = _Sample.merge([self.reference, summary.reference], self.reference_size,
                                       self.reference.rows.shape[1])
        self.mixes = _Sample.merge([self.mixes, summary.mixes], self.sample_size,
                                   self.mixes.rows.shape[1])
        self.rejects.append(summary.rejects)
        self.spans.append(summary.span)
        self.rows += summary.rows
        self.kept += summary.kept
        self.events += summary.events
        self.with_cause += summary.with_cause

    def selection(self, columns: list[str], time_column: str | None) -> SelectedEvents:
        """Counts, rejects numbered as the local job numbers them, and the reference sample."""
        frame = joined_rejects(self.rejects, self.spans, columns)
        frame = frame[[ROW, REASON, *[c for c in frame.columns if c not in (ROW, REASON)]]]
        return SelectedEvents(
            reference=self.reference.rows, rejects=frame, time_column=time_column,
            rows_read=self.rows, rows_in_window=self.kept,
        )


def _empty_tally(groups: int, bundle_path: str) -> Tally:
    catalogue = worker_explainer(bundle_path).catalogue
    return Tally(groups, len(catalogue.codes), len(catalogue.feature_names))
