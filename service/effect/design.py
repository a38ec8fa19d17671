"""The stacked design: each week's treated entities beside entities not treated in the same
weeks, one block of entity-weeks per treatment week (a stacked event study).

Actions are adopted at different times (staggered). A two-way fixed-effects regression over
all entity-weeks would then compare later-treated entities with already-treated ones, whose
own effects are still unfolding, and can get the sign wrong (Goodman-Bacon 2021; de
Chaisemartin & D'Haultfoeuille 2020). The stack avoids those comparisons by construction: for
each week with actions (a cohort), the treated are the entities whose action falls in that
week with no other action of the kind ``before`` weeks before or ``after`` weeks after it (a
clean episode), and the comparison is every entity with no action of the kind in the whole
window (never treated, or treated well before or after: "clean controls", Cengiz, Dube,
Lindner & Zipperer 2019, QJE 134(3); the same comparison as Callaway & Sant'Anna 2021's
not-yet-treated group, within a fixed window). The action's own week belongs to neither side:
it mixes days before and after the action.

With a grouping of the entities (``compare_within``, say the store), a block is one week and
one group: the treated of that week are compared only with untreated entities of their own
group, so that parallel trends need only hold within a group (conditional parallel trends on
a discrete covariate, by exact matching: Heckman, Ichimura & Todd 1997; Abadie 2005). Shocks a
group shares (a store's air, its technician's rota, its season) then fall out of the
comparison instead of into the estimate. Treated entities with no untreated entity of their
group in those weeks are left out and counted as ``unmatched``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from causeline.service.effect.panel import EntityWeeks

# What ``compare_within`` names for comparisons across the whole fleet.
FLEET = "fleet"


@dataclass(frozen=True)
class Window:
    """Weeks before and after the action's week that a block covers."""

    before: int = 6
    after: int = 6

    @property
    def width(self) -> int:
        return self.before + 1 + self.after


@dataclass(frozen=True)
class Stack:
    """One row per (cohort, entity): whether it is treated, and its events and observed days
    per week of the window (columns: ``before`` weeks, the action week, ``after`` weeks).

    ``episodes``: clean episodes found; ``unmatched``: those left out because no entity went
    untreated in their weeks; ``edge``: actions whose window runs past the logs; ``crowded``:
    actions with another of the kind within the window (not clean)."""

    entity: np.ndarray
    cohort: np.ndarray
    treated: np.ndarray
    events: np.ndarray
    days: np.ndarray
    cohort_weeks: np.ndarray
    window: Window
    actions: int
    episodes: int
    unmatched: int
    edge: int
    crowded: int

    @property
    def entities(self) -> int:
        return int(self.entity.max()) + 1 if self.entity.size else 0

    def count(self, treated: bool) -> int:
        """Distinct entities on one side."""
        return int(np.unique(self.entity[self.treated == treated]).size)


def stack(panel: EntityWeeks, kind: str, window: Window, within: np.ndarray | None = None
          ) -> Stack:
    """Build the blocks for one action kind; see the module docstring. ``within``: per entity
    code, the label of its group (a store); each week's treated entities are then compared
    only with untreated entities of their own group, one block per week and group."""
    log = panel.actions[kind]
    n_entities, n_weeks = panel.days.shape
    acted = np.zeros((n_entities, n_weeks + 1), dtype=np.int64)
    inside = (log.weeks >= 0) & (log.weeks < n_weeks)
    np.add.at(acted, (log.codes[inside], log.weeks[inside]), 1)
    weekly = (acted[:, :n_weeks] > 0).astype(np.int64)
    running = np.concatenate([np.zeros((n_entities, 1), np.int64), np.cumsum(weekly, axis=1)],
                             axis=1)
    pairs = np.unique(np.stack([log.codes, log.weeks]), axis=1) if log.codes.size else \
        np.empty((2, 0), dtype=np.int64)
    lo, hi = pairs[1] - window.before, pairs[1] + window.after
    fits = (lo >= 0) & (hi < n_weeks)
    clean = np.zeros(pairs.shape[1], dtype=bool)
    weeks_acted = running[pairs[0, fits], hi[fits] + 1] - running[pairs[0, fits], lo[fits]]
    clean[fits] = weeks_acted == 1
    observed = _observed(panel.days, window)

    entity, cohort, treated = [], [], []
    cohorts = np.unique(pairs[1, clean])
    unmatched = 0
    kept_weeks = []
    for week in cohorts:
        start, stop = week - window.before, week + window.after + 1
        seen = observed[:, week]
        acted = pairs[0, clean & (pairs[1] == week)]
        acted = acted[seen[acted]]
        untreated = np.flatnonzero(((running[:, stop] - running[:, start]) == 0) & seen)
        groups = [None] if within is None else np.unique(within[acted])
        for group in groups:
            chosen = acted if group is None else acted[within[acted] == group]
            comparison = untreated if group is None else untreated[within[untreated] == group]
            if chosen.size == 0:
                continue
            if comparison.size == 0:
                unmatched += chosen.size
                continue
            index = len(kept_weeks)
            kept_weeks.append(week)
            entity += [chosen, comparison]
            cohort += [np.full(chosen.size + comparison.size, index)]
            treated += [np.ones(chosen.size, bool), np.zeros(comparison.size, bool)]
    if kept_weeks:
        rows = np.concatenate(entity)
        blocks = np.concatenate(cohort)
        starts = np.asarray(kept_weeks)[blocks] - window.before
        columns = starts[:, None] + np.arange(window.width)[None, :]
        events, days = panel.events[rows[:, None], columns], panel.days[rows[:, None], columns]
        flags = np.concatenate(treated)
    else:
        rows = blocks = np.empty(0, dtype=np.int64)
        events = days = np.empty((0, window.width))
        flags = np.empty(0, dtype=bool)
    return Stack(rows, blocks, flags, events, days, np.asarray(kept_weeks, dtype=np.int64),
                 window, actions=int(log.codes.size), episodes=int(clean.sum()),
                 unmatched=unmatched, edge=int((~fits).sum()), crowded=int((fits & ~clean).sum()))


def _observed(days: np.ndarray, window: Window) -> np.ndarray:
    """(entities, weeks): True where the entity has observed days both in the ``before`` weeks
    and in the ``after`` weeks around that week."""
    n_entities, n_weeks = days.shape
    running = np.concatenate([np.zeros((n_entities, 1)), np.cumsum(days, axis=1)], axis=1)
    week = np.arange(n_weeks)
    lo = np.clip(week - window.before, 0, n_weeks)
    hi = np.clip(week + window.after + 1, 0, n_weeks)
    before = running[:, week] - running[:, lo]
    after = running[:, hi] - running[:, np.clip(week + 1, 0, n_weeks)]
    return (before > 0) & (after > 0)
