"""``rootcause --engine dask``: the root-cause job with every per-event step on the workers.

The client never holds per-event data, so its memory follows the number of groups and the
bounded samples below, not the size of the input:

1. per partition, a worker reads the rows, sets bad rows aside, applies the time window,
   selects the events (labelled, or scored at or above the threshold) and explains only those.
   The explained events stay on the workers (Dask keeps them, spilling to disk under memory
   pressure); the client receives counts, rejected rows and two bounded samples: feature rows
   for the fix simulation and cause mixes for the fit;
2. the client finds the groups' profiles
   (:class:`~causeline.service.rootcause.grouping.GroupFinder`) on a sample of the events with
   a cause (at most :data:`~causeline.service.rootcause.grouping.FIT_SAMPLE` by default); the
   workers place every event by the nearest profile, as the local engine does, and tally each
   partition's share of every group's description (:mod:`causeline.service.rootcause.tally`),
   which the client adds up in input order;
3. the workers simulate each group's fix on their events, and write nothing: the client
   streams each partition's rows of event_groups.csv into the output in input order.

The fit sample is drawn as the local engine draws it, by a hash of the event ids, so both
engines find the same profiles on the same events whenever the sample is the same: always
when every event with a cause fits in it. The smallest group scales with the sample: the size
the local engine would use for all events, times the sampled share.

Samples are drawn without knowing the total: each row gets a key (the id's hash for the fit
sample, a seeded random number for the reference rows) and the rows with the smallest keys win
(a bottom-k sample), so one pass suffices and each partition sends at most k rows.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import dask
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
from causeline.service.files.window import window_mask
from causeline.service.progress import Progress, Silent
from causeline.service.rootcause.fix import Target
from causeline.service.rootcause.grouping import (
    FIT_SAMPLE,
    UNGROUPED,
    GroupFinder,
    assign,
    cause_lift,
    cause_mix,
    sample_keys,
)
from causeline.service.rootcause.intake import EventInput, event_times, screen_rows
from causeline.service.rootcause.job import (
    STEPS,
    Grouping,
    RootCauseOptions,
    RootCauseResult,
    SelectedEvents,
    finish_rootcause,
    start_rootcause,
)
from causeline.service.rootcause.tally import (
    SEED,
    EventSlice,
    Explained,
    Tally,
    avoidable_in_slice,
    event_frame,
    kept_columns,
    tally_slice,
)

# Rows the fix simulation fits its co-driver lines on (slopes, means, ranges): a uniform sample
# this large pins them down to well under a per cent.
REFERENCE_SIZE = 200_000


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
    foreseen: int


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
    causes = explainer.catalogue.causes
    mix, has_cause = cause_mix(explanation.code_contributions, causes)
    lift = cause_lift(explanation.code_contributions, causes)
    caused = np.flatnonzero(has_cause)
    # Each sampled row: the mix, then the lift in the last column.
    rows = np.column_stack([mix[caused], lift[caused]])
    mixes = _Sample.of(sample_keys(explanation.ids)[caused], rows, index, sample_size)
    mixes = replace(mixes, position=caused[mixes.position])
    part = EventSlice(
        index=index, events=kept_columns(bundle, events),
        times=times[selected].reset_index(drop=True),
        explanation=Explained.of(explanation), keys=event_keys, entity=spec.entity,
        labels=np.full(len(events), -1, dtype=np.int64), strength=np.zeros(len(events)),
    )
    summary = _Summary(
        span=block.span, rows=len(block.table) + len(block.rejects), kept=len(table),
        events=len(events), rejects=screened.rejects,
        reference=_Sample.of(reference_keys, screened.reference, index, reference_size),
        mixes=mixes, with_cause=int(caused.size), foreseen=screened.foreseen,
    )
    return _Selected(part, summary)


def _summary_of(selected: _Selected) -> _Summary:
    return selected.summary


def _label_part(selected: _Selected, profiles: np.ndarray, held: np.ndarray, bundle_path: str
                ) -> EventSlice:
    """On a worker: every event of the partition placed by the nearest profile (ungrouped when
    that is a held one, of no clear cause)."""
    part = selected.events
    causes = worker_explainer(bundle_path).catalogue.causes
    mix, has_cause = cause_mix(part.explanation.code_contributions, causes)
    labels, strength = assign(mix, has_cause, profiles, held)
    return replace(part, labels=labels, strength=strength)


def _tally_part(part: EventSlice, groups: int, bundle_path: str) -> Tally:
    return tally_slice(part, groups, worker_explainer(bundle_path))


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
    progress: Progress | None = None,
    reference_size: int = REFERENCE_SIZE,
) -> RootCauseResult:
    """The root-cause job on a Dask cluster; the same outputs as the local engine."""
    options = options or RootCauseOptions()
    progress = progress or Silent()
    sample_size = options.fit_sample or FIT_SAMPLE
    out = Path(out)
    start = start_rootcause(out, options)
    if Path(events_path).is_dir() and is_prediction_log(Path(events_path)):
        raise DataError(f"{events_path}: a prediction log is read by --engine local only")
    spec = bundle.spec
    settings = settings or DaskSettings()
    source = read_partitions(events_path, [c for c in (spec.id, spec.entity) if c],
                             settings.partition_mb)
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
        progress.start("reading and explaining", len(source.parts), "partitions")

        def summarised(position: int, summary: _Summary) -> None:
            gathered.add(summary)
            progress.advance(position + 1, gathered.rows)

        stream_ordered(client, [dask.delayed(_summary_of)(f) for f in selected], summarised)
        progress.finish()
        selection = gathered.selection(source.columns, bundle.spec.time)
        mixes, with_cause = gathered.mixes, gathered.with_cause
        progress(f"step 4/{STEPS}: grouping {with_cause:,} events with a cause (profiles found "
                 f"on {mixes.keys.size:,})")
        finder = GroupFinder(options.min_group_size).fit(
            mixes.rows[:, :-1], mixes.keys, with_cause, mixes.rows[:, -1])
        parameters = {"engine": "dask", **finder.parameters(mixes.keys.size, sample_size)}
        labelled = [
            client.compute(dask.delayed(_label_part)(
                future, finder.profiles_, finder.held_, bundle_path))
            for future in selected
        ]
        del selected  # the labelled slices replace them on the workers
        groups = int(finder.profiles_.shape[0])
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
        total = np.zeros((len(targets), 2))
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


class _Gathered:
    """The partitions' summaries added up as they arrive: counts, rejects, running samples.

    Only the bounded samples and one span per partition are kept, so what the client holds
    does not grow with the number of events (rejected rows excepted: they are output).
    """

    def __init__(self, sample_size: int, reference_size: int, width: int, codes: int) -> None:
        self.sample_size, self.reference_size = sample_size, reference_size
        self.reference = _Sample.merge([], reference_size, width)
        self.mixes = _Sample.merge([], sample_size, codes + 1)
        self.rejects: list[pd.DataFrame] = []
        self.spans: list[int] = []
        self.rows = self.kept = self.events = self.with_cause = self.foreseen = 0

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
        self.foreseen += summary.foreseen

    def selection(self, columns: list[str], time_column: str | None) -> SelectedEvents:
        """Counts, rejects numbered as the local job numbers them, and the reference sample."""
        frame = joined_rejects(self.rejects, self.spans, columns)
        frame = frame[[ROW, REASON, *[c for c in frame.columns if c not in (ROW, REASON)]]]
        return SelectedEvents(
            reference=self.reference.rows, rejects=frame, time_column=time_column,
            rows_read=self.rows, rows_in_window=self.kept, foreseen=self.foreseen,
        )


def _empty_tally(groups: int, bundle_path: str) -> Tally:
    catalogue = worker_explainer(bundle_path).catalogue
    return Tally(groups, len(catalogue.codes), len(catalogue.feature_names))
