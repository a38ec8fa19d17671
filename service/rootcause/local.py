"""The local root-cause engine: one process reads, selects and explains the events, finds the
groups on all of them, then finishes the job as every engine does
(:func:`causeline.service.rootcause.job.finish_rootcause`).
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pandas as pd

from causeline.service.bundle.load import Bundle
from causeline.service.errors import DataError
from causeline.service.explain.explainer import Explainer
from causeline.service.features.logs import RawPaths
from causeline.service.files.predlog import is_prediction_log
from causeline.service.files.window import window_mask
from causeline.service.progress import Progress, Silent
from causeline.service.rootcause.fix import Target
from causeline.service.rootcause.grouping import (
    FIT_SAMPLE,
    UNGROUPED,
    GroupFinder,
    bottom,
    cause_lift,
    cause_mix,
    sample_keys,
)
from causeline.service.rootcause.intake import (
    event_times,
    events_from_logs,
    read_events,
    screen_rows,
)
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
    avoidable_in_slice,
    event_frame,
    kept_columns,
    tally_slice,
)

# Events explained at a time: a full explanation (reason objects) of this many stays small,
# and the progress line moves.
CHUNK = 50_000


def explain_in_chunks(explainer: Explainer, events: pd.DataFrame, progress: Progress
                      ) -> Explained:
    """Every event explained, kept in the compact form later steps read."""
    progress.start("explaining", len(events), "events")
    pieces = []
    for start in range(0, len(events), CHUNK):
        chunk = events.iloc[start:start + CHUNK].reset_index(drop=True)
        pieces.append(Explained.of(explainer.explain(chunk)))
        progress.advance(start + len(chunk))
    progress.finish()
    if not pieces:
        return Explained.of(explainer.explain(events))
    return Explained.join(pieces)


class LocalSlices:
    """The local engine's events: one slice, in memory."""

    def __init__(self, bundle: Bundle, part: EventSlice, reference: np.ndarray) -> None:
        self.bundle = bundle
        self.part = part
        self.reference = reference

    def avoidable(self, targets: list[list[Target]]) -> np.ndarray:
        return avoidable_in_slice(self.bundle, self.part, targets, self.reference)

    def event_frames(self, group_ids: list[str]) -> Iterator[pd.DataFrame]:
        yield event_frame(self.part, group_ids, UNGROUPED)


def run_rootcause(
    bundle: Bundle,
    events_path: Path | RawPaths,
    out: Path,
    options: RootCauseOptions | None = None,
    progress: Progress | None = None,
) -> RootCauseResult:
    """Group the selected events (a table, a prediction log, or a timeline bundle's raw logs)
    and write the outputs into ``out``."""
    options = options or RootCauseOptions()
    progress = progress or Silent()
    out = Path(out)
    start = start_rootcause(out, options)
    since, until = start.since, start.until

    if isinstance(events_path, RawPaths):
        progress(f"step 1/{STEPS}: building snapshots from the {events_path}")
        source = events_from_logs(bundle, events_path)
    else:
        if is_prediction_log(events_path) and not options.predicted:
            raise DataError(
                f"{events_path}: a prediction log has no labels; pass --predicted to group "
                "rows scored at or above the threshold"
            )
        progress(f"step 1/{STEPS}: reading {events_path}")
        source = read_events(bundle, events_path)
    if source.repeats_dropped:
        progress(f"step 1/{STEPS}: {source.repeats_dropped:,} repeated log entries dropped "
                 "(an event id logged more than once counts once, its latest entry)")
    times = event_times(source)
    window = window_mask(times, since, until, source.time_column)
    table = source.table[window]
    times = times.loc[table.index]

    progress(f"step 2/{STEPS}: selecting events among {len(table):,} rows")
    screened = screen_rows(
        bundle, table, source.rows[window], source.rejects, options.predicted,
        f"{events_path}: ",
    )
    rejects, reference, selected = screened.rejects, screened.reference, screened.selected
    table, times = table[screened.keep], times[screened.keep]
    events = table[selected].reset_index(drop=True)
    times = times[selected].reset_index(drop=True)

    progress(f"step 3/{STEPS}: explaining {len(events):,} events")
    explainer = Explainer(bundle)
    explained = explain_in_chunks(explainer, events, progress)
    mix, has_cause = cause_mix(explained.code_contributions, explainer.catalogue.causes)
    caused = np.flatnonzero(has_cause)
    keys = sample_keys(explained.ids)
    fit_sample = options.fit_sample or FIT_SAMPLE
    fit = caused[bottom(keys[caused], fit_sample)]

    progress(f"step 4/{STEPS}: grouping {caused.size:,} events with a cause "
             f"(profiles found on {fit.size:,})")
    lift = cause_lift(explained.code_contributions, explainer.catalogue.causes)
    finder = GroupFinder(options.min_group_size).fit(mix[fit], keys[fit], caused.size, lift[fit])
    labels, strength = finder.assign(mix, has_cause)
    part = EventSlice(
        index=0, events=kept_columns(bundle, events), times=times, explanation=explained,
        keys=np.random.default_rng(SEED).random(len(events)), entity=bundle.spec.entity,
        labels=labels, strength=strength,
    )
    groups = int(finder.profiles_.shape[0])
    selection = SelectedEvents(
        reference=reference, rejects=rejects, time_column=source.time_column,
        rows_read=len(source.table) + source.repeats_dropped + len(source.rejects),
        rows_in_window=len(table), repeats_dropped=source.repeats_dropped,
        foreseen=screened.foreseen,
    )
    grouping = Grouping(groups, {"engine": "local", **finder.parameters(fit.size, fit_sample)},
                        tally_slice(part, groups, explainer))
    return finish_rootcause(bundle, events_path, out, options, start, selection, grouping,
                            LocalSlices(bundle, part, reference), progress)
