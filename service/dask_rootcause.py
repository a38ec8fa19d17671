"""``rootcause --engine dask``: select and explain events on the workers, group on a sample.

Per partition, a worker reads the rows, sets bad rows aside, applies the time window, selects
the events (labelled, or scored at or above the threshold) and explains only those. What comes
back to the client is per *event*, never per row: the events' input rows, times and
explanations (ids, probabilities, reasons, feature and code-contribution matrices), plus a
bounded uniform sample of feature rows for the fix simulation and the rejected rows. Events are
a small share of the rows (a few per cent in the demo), so the client's memory follows the
number of events, not the size of the input.

Grouping. HDBSCAN is fitted on a uniform random sample of at most :data:`SAMPLE_SIZE` events
with a cause (seeded: the same input gives the same sample), with ``prediction_data`` kept;
the other events are placed into its groups by ``hdbscan.approximate_predict`` on the workers.
When every event fits in the sample, the fit is the local engine's fit on the same events in
the same order, so the groups are identical. The smallest group scales with the sample:
the size the local engine would use for all events, times the sampled share.

Samples are drawn without knowing the total: each row gets a seeded random key and the rows
with the smallest keys win (a bottom-k sample), so one pass suffices and each partition sends
at most k rows.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import dask
import hdbscan
import numpy as np
import pandas as pd

from service.bundle import Bundle
from service.dask_engine import (
    DaskSettings,
    dask_client,
    read_partitions,
    stream_ordered,
    worker_explainer,
)
from service.errors import DataError
from service.explain import Explanation
from service.features import FeatureMatrix, RowProblem
from service.predlog import is_prediction_log
from service.rejects import (
    REASON,
    ROW,
    empty_rejects,
)
from service.rootcause import GroupFinder, cause_mix, default_min_cluster_size
from service.rootcause_input import EventInput, event_times, screen_rows, window_mask
from service.rootcause_run import (
    STEPS,
    Grouping,
    JobStart,
    RootCauseOptions,
    RootCauseResult,
    SelectedEvents,
    _quiet,
    finish_rootcause,
    start_rootcause,
)
from service.tables import as_text
from service.treeshap import Contributions

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
SEED = 20240601


@dataclass(frozen=True)
class _Part:
    """What one partition sends back: its events, explained, and bounded samples."""

    rows: int
    kept: int
    rejects: pd.DataFrame
    events: pd.DataFrame
    times: pd.Series
    explanation: Explanation | None
    event_keys: np.ndarray
    reference: np.ndarray
    reference_keys: np.ndarray


def _select_part(
    table: pd.DataFrame, index: int, bundle_path: str, options: RootCauseOptions,
    start: JobStart, reference_size: int,
) -> _Part:
    """On a worker: one partition through steps 1-3 of the local job."""
    explainer = worker_explainer(bundle_path)
    bundle = explainer.bundle
    spec = bundle.spec
    table = as_text(table.reset_index(drop=True), [c for c in (spec.id, spec.entity) if c])
    rows = len(table)
    source = EventInput(table, spec.id, spec.time, False, np.arange(rows), empty_rejects())
    times = event_times(source)
    window = window_mask(times, start.since, start.until, spec.time) if rows else np.ones(0, bool)
    table, times = table[window], times[window]
    screened = screen_rows(
        bundle, table, np.flatnonzero(window), empty_rejects(table.columns), options.predicted
    )
    rejects, reference, selected = screened.rejects, screened.reference, screened.selected
    table, times = table[screened.keep], times[screened.keep]
    events = table[selected].reset_index(drop=True)
    rng = np.random.default_rng([SEED, index])
    reference_keys = rng.random(len(reference))
    chosen = np.sort(np.argsort(reference_keys, kind="stable")[:reference_size])
    return _Part(
        rows=rows,
        kept=len(table),
        rejects=rejects,
        events=events,
        times=times[selected].reset_index(drop=True),
        explanation=explainer.explain(events) if len(events) else None,
        event_keys=rng.random(len(events)),
        reference=reference[chosen],
        reference_keys=reference_keys[chosen],
    )


def _assign(clusterer: hdbscan.HDBSCAN, mix: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """On a worker: place events into the sample's groups (label -1: none)."""
    if len(mix) == 0:
        return np.zeros(0, np.int64), np.zeros(0)
    labels, strength = hdbscan.approximate_predict(clusterer, mix)
    return np.asarray(labels, np.int64), np.where(labels >= 0, strength, 0.0)


def run_rootcause_dask(
    bundle: Bundle,
    events_path: Path | str,
    out: Path,
    options: RootCauseOptions | None = None,
    settings: DaskSettings | None = None,
    progress=_quiet,  # type: ignore[no-untyped-def]
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
    progress(f"step 1-3/{STEPS}: reading, selecting and explaining events "
             f"({len(source.parts)} partitions)")
    parts: list[_Part] = []
    with dask_client(settings) as client:
        tasks = [
            dask.delayed(_select_part)(part, index, bundle_path, options, start, reference_size)
            for index, part in enumerate(source.parts)
        ]
        stream_ordered(client, tasks, lambda _, part: parts.append(part))
        selection, keys = _selection(parts, source.kind, bundle, reference_size)
        progress(f"step 4/{STEPS}: clustering {len(selection.events):,} events")
        codes = selection.explanation.code_contributions
        grouping = _group(client, codes, options, sample_size, keys)
    return finish_rootcause(
        bundle, Path(events_path), out, options, start, selection, grouping, progress
    )


def _selection(
    parts: list[_Part], kind: str, bundle: Bundle, reference_size: int
) -> tuple[SelectedEvents, np.ndarray]:
    """The partitions' events joined in input order (and their sample keys), rejects numbered
    as the local job numbers them."""
    # Row numbers as the local reader gives them: line numbers in a CSV (header = line 1,
    # assuming no line breaks inside cells), 1-based positions in Parquet.
    first = 2 if kind == "csv" else 1
    offsets = np.concatenate([[0], np.cumsum([p.rows for p in parts])])
    rejects = []
    for part, offset in zip(parts, offsets, strict=False):
        if len(part.rejects):
            shifted = part.rejects.copy()
            shifted[ROW] = shifted[ROW].to_numpy() + offset + first
            rejects.append(shifted)
    keys = np.concatenate([p.reference_keys for p in parts]) if parts else np.zeros(0)
    reference = (
        np.vstack([p.reference for p in parts]) if parts
        else np.zeros((0, len(bundle.spec.feature_names)))
    )
    # Bottom-k over the partitions' bottom-k samples, back in input order.
    chosen = np.sort(np.argsort(keys, kind="stable")[:reference_size])
    with_events = [p for p in parts if p.explanation is not None]
    if with_events:
        explanation = _concat([p.explanation for p in with_events])  # type: ignore[misc]
        events = pd.concat([p.events for p in with_events], ignore_index=True)
        times = pd.concat([p.times for p in with_events], ignore_index=True)
    else:
        empty = parts[0].events if parts else pd.DataFrame(columns=[bundle.spec.id])
        explanation = worker_explainer(str(Path(bundle.path).resolve())).explain(empty)
        events = empty.reset_index(drop=True)
        times = pd.Series(pd.NaT, index=events.index, dtype="datetime64[ns, UTC]")
    frame = (
        pd.concat(rejects, ignore_index=True) if rejects
        else empty_rejects(parts[0].events.columns if parts else ())
    )
    frame = frame[[ROW, REASON, *[c for c in frame.columns if c not in (ROW, REASON)]]]
    return SelectedEvents(
        events=events,
        times=times,
        explanation=explanation,
        reference=reference[chosen],
        rejects=frame,
        time_column=bundle.spec.time,
        rows_read=int(offsets[-1]),
        rows_in_window=sum(p.kept for p in parts),
    ), np.concatenate([p.event_keys for p in with_events]) if with_events else np.zeros(0)


def _group(
    client: Any, codes: np.ndarray, options: RootCauseOptions, sample_size: int, keys: np.ndarray
) -> Grouping:
    """HDBSCAN on a bounded sample of events, the rest placed by approximate prediction."""
    mix, has_cause = cause_mix(codes)
    rows = np.flatnonzero(has_cause)
    parameters: dict[str, Any] = {"engine": "dask", "sample_size": sample_size, "seed": SEED}
    if rows.size <= sample_size:
        finder = GroupFinder(min_cluster_size=options.min_group_size).fit(mix, has_cause)
        parameters.update(min_cluster_size=finder.min_cluster_size_,
                          min_samples=finder.min_samples_, sampled_events=int(rows.size))
        return Grouping(finder.labels_, finder.strength_, parameters)
    sample = np.sort(rows[np.argsort(keys[rows], kind="stable")[:sample_size]])
    full = options.min_group_size or default_min_cluster_size(rows.size)
    scaled = max(SAMPLED_MIN_GROUP, round(full * sample_size / rows.size))
    finder = GroupFinder(min_cluster_size=scaled).fit(mix[sample])
    labels = np.full(len(mix), -1, dtype=np.int64)
    strength = np.zeros(len(mix))
    labels[sample], strength[sample] = finder.labels_, finder.strength_
    rest = np.setdiff1d(rows, sample, assume_unique=True)
    if finder.clusterer_ is not None and rest.size:
        remote = client.scatter(finder.clusterer_, broadcast=True)
        chunks = np.array_split(rest, max(1, rest.size // sample_size + 1))
        futures = client.map(_assign, [remote] * len(chunks), [mix[c] for c in chunks], pure=False)
        for chunk, (assigned, weight) in zip(chunks, client.gather(futures), strict=True):
            labels[chunk], strength[chunk] = assigned, weight
    parameters.update(min_cluster_size=full, min_samples=finder.min_samples_,
                      sampled_events=int(sample.size), sample_min_cluster_size=scaled)
    return Grouping(labels, strength, parameters)


def _concat(parts: list[Explanation]) -> Explanation:
    """Explanations of consecutive slices of events as one (rows renumbered)."""
    problems: list[RowProblem] = []
    offset = 0
    for part in parts:
        problems += [
            RowProblem(p.row + offset, p.column, p.message) for p in part.features.problems
        ]
        offset += len(part.ids)
    return Explanation(
        ids=[i for p in parts for i in p.ids],
        features=FeatureMatrix(
            values=np.vstack([p.features.values for p in parts]),
            names=parts[0].features.names,
            problems=problems,
        ),
        contributions=Contributions(
            values=np.vstack([p.contributions.values for p in parts]),
            base_value=parts[0].contributions.base_value,
        ),
        probability=np.concatenate([p.probability for p in parts]),
        decision=np.concatenate([p.decision for p in parts]),
        code_contributions=np.vstack([p.code_contributions for p in parts]),
        reasons=[r for p in parts for r in p.reasons],
        warnings=[w for p in parts for w in p.warnings],
    )
