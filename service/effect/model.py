"""The model's own estimate of a fix's effect on the entities the study treats.

The snapshots of each treated entity in the weeks before its action are re-scored with the
fix's target settings applied, as the root-cause job simulates a fix
(:func:`causeline.service.rootcause.fix.events_avoidable`, co-drivers moved along with the
targets). The mean drop in probability, spread over the horizon, is the model's promise in
events per 1,000 entity-days (negative: fewer events); beside the measured effect it shows
where the simulation over- or under-promises. A snapshot whose risk the fix would raise counts
zero, as in the root-cause job. It is a model estimate: associations, not causes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from causeline.service.bundle.load import Bundle
from causeline.service.effect.design import Stack
from causeline.service.effect.panel import DAY_NS, EntityWeeks, day_number, week_number
from causeline.service.errors import DataError
from causeline.service.explain.reasons import ReasonCatalogue
from causeline.service.explain.score import probability
from causeline.service.features.logs import TimelineInputs
from causeline.service.features.snapshots import build_snapshots, labelled_table
from causeline.service.files.rejects import cell_reasons, keep_mask
from causeline.service.rootcause.fix import events_avoidable, fix_targets
from causeline.service.spec.timeline import span_amount

PER = 1000.0


@dataclass(frozen=True)
class ModelEstimate:
    """The model's effect (events per 1,000 entity-days; NaN with a note saying why none)."""

    effect: float
    snapshots: int
    targets: str
    note: str = ""


class ModelCheck:
    """Built once per run: the bundle's snapshots of every entity, scored; ``estimate`` then
    re-scores a study's treated entities before their actions with a fix's targets."""

    def __init__(self, bundle: Bundle, inputs: TimelineInputs, panel: EntityWeeks) -> None:
        spec = bundle.spec
        if spec.timeline is None or spec.entity is None or spec.time is None:
            raise DataError(f"{bundle.path}: the model estimate needs a bundle built from "
                            "timelines (a timeline section, entity and time)")
        if spec.timeline.clock != "time":
            raise DataError(f"{bundle.path}: the model estimate needs a time clock")
        self.bundle = bundle
        self.catalogue = ReasonCatalogue(spec, bundle.manifest.stats)
        table = labelled_table(spec, build_snapshots(spec.timeline, inputs))
        features = bundle.builder.transform(table)
        keep = keep_mask(len(table), cell_reasons(features.problems))
        self.table = table[keep].reset_index(drop=True)
        self.reference = features.values[keep]
        self.probability = probability(bundle, self.reference)
        times = pd.to_datetime(self.table[spec.time]).to_numpy().astype("datetime64[ns]")
        self.week = week_number(day_number(times.view(np.int64))) - panel.first_week
        self.entity = pd.Index(panel.names).get_indexer(self.table[spec.entity].astype(str))
        self.horizon_days = span_amount(spec.timeline.horizon, "time") * 1e9 / DAY_NS

    def estimate(self, codes: tuple[str, ...], stack: Stack) -> ModelEstimate:
        missing = [code for code in codes if code not in self.catalogue.index]
        if missing:
            return ModelEstimate(float("nan"), 0, "", f"the bundle's catalogue has no code "
                                 f"{missing[0]}")
        targets = fix_targets(self.catalogue, codes)
        if not targets:
            return ModelEstimate(float("nan"), 0, "", "the fix sets no targets; the model has "
                                 "nothing to simulate")
        described = "; ".join(target.describe() for target in targets)
        rows = self._before(stack)
        if rows.size == 0:
            return ModelEstimate(float("nan"), 0, described, "no scored snapshot of a treated "
                                 "entity in the weeks before its action")
        _, reduction = events_avoidable(self.bundle, self.table.iloc[rows],
                                        self.probability[rows], targets, self.reference)
        effect = -PER * reduction / rows.size / self.horizon_days
        return ModelEstimate(float(effect), int(rows.size), described)

    def _before(self, stack: Stack) -> np.ndarray:
        """Positions of the snapshots of treated entities in the weeks before their action."""
        chosen = stack.treated
        weeks = stack.cohort_weeks[stack.cohort[chosen]]
        start = weeks - stack.window.before
        pairs = pd.DataFrame({"entity": stack.entity[chosen], "start": start, "stop": weeks})
        rows = pd.DataFrame({"entity": self.entity, "week": self.week,
                             "row": np.arange(self.entity.size)})
        joined = rows.merge(pairs, on="entity")
        inside = (joined["week"] >= joined["start"]) & (joined["week"] < joined["stop"])
        return np.unique(joined.loc[inside, "row"].to_numpy())
