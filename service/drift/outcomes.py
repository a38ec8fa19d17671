"""Outcomes for the calibration checks joined from a failure log, as training labels snapshots.

A bundle trained from timelines keeps its ``timeline:`` section: the failure log's columns, the
failure types to predict, the horizon and the clock. An event of entity e at time t is then
``1`` when a failure of a chosen type falls in ``(t, t + horizon]``, ``0`` when none does and
the horizon ends by the end of observation (the entity's last event in the window or its last
failure of any type, whichever is later, as in training), and unknown (censored: left out, or
``0`` where the timeline says ``censored: negative``) otherwise. Training's down rule is not
applied: events the service scored are taken as scored.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from causeline.service.errors import DataError
from causeline.service.features.labels import EventLog
from causeline.service.features.logs import Clock, event_log, failure_filter, require_columns
from causeline.service.files.tables import read_table
from causeline.service.spec.dataset import DatasetSpec
from causeline.service.spec.timeline import TimelineSpec


@dataclass
class FailureOutcomes:
    """Collects each event's entity and time as the window streams by, then labels them."""

    timeline: TimelineSpec
    entity: str
    time: str
    entities: list[np.ndarray] = field(default_factory=list)
    times: list[np.ndarray] = field(default_factory=list)

    @classmethod
    def of(cls, spec: DatasetSpec, path: Path) -> FailureOutcomes:
        if spec.timeline is None:
            raise DataError(f"--failures {path}: model {spec.name!r} was not trained from "
                            "timelines, so it keeps no horizon or failure types; give outcomes "
                            "with --label COLUMN")
        if spec.entity is None or spec.time is None:
            raise DataError(f"--failures {path}: the spec names no entity and time columns")
        return cls(spec.timeline, spec.entity, spec.time)

    def add(self, frame: pd.DataFrame) -> None:
        require_columns(frame, "window", [self.entity, self.time])
        entities = frame[self.entity]
        if entities.isna().any():
            row = int(np.flatnonzero(entities.isna().to_numpy())[0])
            raise DataError(f"window: an event without {self.entity!r} (row {row + 1} of a "
                            "chunk); outcomes from the failure log need each event's entity")
        self.entities.append(entities.astype(str).to_numpy())
        self.times.append(Clock(self.timeline).values(frame[self.time], "window", self.time))

    def labels(self, path: Path) -> tuple[np.ndarray, dict[str, object]]:
        """Per event collected: 1.0, 0.0 or NaN (censored, left out); and what was done."""
        clock = Clock(self.timeline)
        entities = np.concatenate(self.entities) if self.entities else np.empty(0, dtype=str)
        times = np.concatenate(self.times) if self.times else np.empty(0, dtype=np.int64)
        names, codes = np.unique(entities, return_inverse=True)
        spec = self.timeline.failures
        frame = read_table(Path(path), text_columns=[spec.entity])
        every = event_log(spec.entity, spec.time, frame, "failures", names, clock, None)
        chosen = event_log(spec.entity, spec.time, frame, "failures", names, clock,
                           failure_filter(self.timeline))
        horizon = clock.span(self.timeline.horizon)
        # The end of observation per entity: its last event here or its last failure.
        end = np.full(names.size, times.min() if times.size else 0, dtype=times.dtype)
        np.maximum.at(end, codes, times)
        np.maximum.at(end, every.codes, every.times.astype(times.dtype))
        upcoming, found = EventLog(chosen.codes, chosen.times).next_after(codes, times)
        positive = found & (upcoming <= times + horizon)
        censored = ~positive & (times + horizon > end[codes])
        y = positive.astype(float)
        if self.timeline.censored == "exclude":
            y[censored] = np.nan
        return y, {
            "source": "failure log", "failures": str(path), "horizon": self.timeline.horizon,
            "failure_types": list(spec.types) or "all",
            "events_labelled": int(np.sum(~np.isnan(y))),
            "censored": int(censored.sum()), "censored_as": self.timeline.censored,
            "failures_of_window_entities": int(chosen.codes.size),
            "failures_of_other_entities": int(len(frame) - every.codes.size),
        }
