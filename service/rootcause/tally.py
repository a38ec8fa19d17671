"""Root-cause groups described slice by slice: what a slice of events adds, and how slices add up.

A group's row in groups.csv is made of sums (events, cause mix, code contributions, events
avoidable), extremes (first and last event), counts (entities, weeks), its strongest members
(examples) and a bounded sample of its members' feature values (driver values). Each can be
computed on one slice of the events and combined with the others', so no step needs another
slice's rows: the local engine runs one slice (all its events), the Dask engine one per
partition on the workers, and the client only ever holds combined tallies, whose size follows
the number of groups and codes, not the number of events.

Driver values are medians (numeric) or the most frequent value (categorical) of a uniform
sample of at most :data:`DRIVER_SAMPLE` members per group, drawn by seeded random keys (a
bottom-k sample), so a group that fits in the sample gets exact values.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from causeline.service.bundle.load import Bundle
from causeline.service.explain.explainer import Explainer, Explanation
from causeline.service.explain.reasons import ReasonCatalogue, format_value
from causeline.service.rootcause.fix import Target, events_avoidable
from causeline.service.rootcause.grouping import (
    EXAMPLES,
    LEADING_CODES,
    TOP_ENTITIES,
    Group,
    cause_mix,
    label_for,
)

# Members per group whose feature values are kept for the driver medians: the sample median of
# 10,000 values lies within about 1 % (in rank) of the true one.
DRIVER_SAMPLE = 10_000
# Seeds every random key that draws a bounded sample, in both engines: same input, same samples.
SEED = 20240601


@dataclass(frozen=True)
class Explained:
    """What the later steps use of a slice's explanation, as arrays and one text per event.

    A full :class:`Explanation` holds Python objects per reason (a kilobyte or more per event);
    a million events kept on workers between steps would not fit. Reason texts are rebuilt
    for the few examples shown (:func:`tally_slice`), from the same rows and the same model.
    """

    ids: list[str]
    probability: np.ndarray
    code_contributions: np.ndarray
    features: np.ndarray  # model-ready feature values
    top_codes: list[str]  # "CODE_A; CODE_B", the ranked reason codes
    warned: np.ndarray  # bool: the event carries a warning

    @staticmethod
    def join(pieces: list[Explained]) -> Explained:
        """Explained slices of consecutive events, as one."""
        return Explained(
            ids=[i for piece in pieces for i in piece.ids],
            probability=np.concatenate([p.probability for p in pieces]),
            code_contributions=np.vstack([p.code_contributions for p in pieces]),
            features=np.vstack([p.features for p in pieces]),
            top_codes=[c for piece in pieces for c in piece.top_codes],
            warned=np.concatenate([p.warned for p in pieces]),
        )

    @staticmethod
    def of(explanation: Explanation) -> Explained:
        return Explained(
            ids=explanation.ids, probability=explanation.probability,
            code_contributions=explanation.code_contributions,
            features=explanation.features.values,
            top_codes=["; ".join(r.code for r in reasons) for reasons in explanation.reasons],
            warned=np.array([bool(w) for w in explanation.warnings], dtype=bool),
        )


def kept_columns(bundle: Bundle, events: pd.DataFrame) -> pd.DataFrame:
    """The event columns later steps read (id, entity, time and the model's raw inputs)."""
    spec = bundle.spec
    wanted = [spec.id, spec.entity, spec.time, *bundle.builder.required_columns]
    return events[[c for c in dict.fromkeys(wanted) if c and c in events.columns]]


@dataclass(frozen=True)
class EventSlice:
    """Selected events of one slice of the input, explained, with their grouping.

    ``index`` orders slices as the input is ordered; ``keys`` are seeded random numbers, one
    per event, that draw every bounded sample; ``labels`` (-1: ungrouped) and ``strength`` come
    from the grouping.
    """

    index: int
    events: pd.DataFrame  # the columns :func:`kept_columns` keeps
    times: pd.Series
    explanation: Explained
    keys: np.ndarray
    entity: str | None
    labels: np.ndarray
    strength: np.ndarray

    def __len__(self) -> int:
        return len(self.explanation.ids)


@dataclass(frozen=True)
class Example:
    """A member shown in full; ``order`` (slice, position) breaks ties as the input order does."""

    strength: float
    order: tuple[int, int]
    event_id: str
    probability: float
    reasons: list[tuple[str, str, float]]


@dataclass
class Tally:
    """Per group (index = HDBSCAN label): sums, extremes, counts, examples and samples."""

    groups: int
    codes: int
    features: int
    count: np.ndarray = field(init=False)
    mix: np.ndarray = field(init=False)
    contribution: np.ndarray = field(init=False)
    first: list[pd.Timestamp | None] = field(init=False)
    last: list[pd.Timestamp | None] = field(init=False)
    entities: list[Counter[str]] = field(init=False)
    examples: list[list[Example]] = field(init=False)
    sample_keys: list[np.ndarray] = field(init=False)
    sample_rows: list[np.ndarray] = field(init=False)
    weekly: Counter[tuple[pd.Timestamp, int]] = field(default_factory=Counter)  # -1: ungrouped
    events: int = 0
    warned: int = 0
    first_event: pd.Timestamp | None = None
    last_event: pd.Timestamp | None = None

    def __post_init__(self) -> None:
        g = self.groups
        self.count = np.zeros(g, dtype=np.int64)
        self.mix = np.zeros((g, self.codes))
        self.contribution = np.zeros((g, self.codes))
        self.first = [None] * g
        self.last = [None] * g
        self.entities = [Counter() for _ in range(g)]
        self.examples = [[] for _ in range(g)]
        self.sample_keys = [np.zeros(0) for _ in range(g)]
        self.sample_rows = [np.zeros((0, self.features)) for _ in range(g)]

    @property
    def grouped(self) -> int:
        return int(self.count.sum())

    def add(self, other: Tally) -> Tally:
        """Combine with the tally of a later slice (in place; returns self)."""
        self.count += other.count
        self.mix += other.mix
        self.contribution += other.contribution
        for g in range(self.groups):
            self.first[g] = _earliest(self.first[g], other.first[g])
            self.last[g] = _latest(self.last[g], other.last[g])
            self.entities[g].update(other.entities[g])
            self.examples[g] = _strongest(self.examples[g] + other.examples[g])
            self.sample_keys[g], self.sample_rows[g] = _bottom(
                np.concatenate([self.sample_keys[g], other.sample_keys[g]]),
                np.vstack([self.sample_rows[g], other.sample_rows[g]]),
            )
        self.weekly.update(other.weekly)
        self.events += other.events
        self.warned += other.warned
        self.first_event = _earliest(self.first_event, other.first_event)
        self.last_event = _latest(self.last_event, other.last_event)
        return self


def group_row(
    catalogue: ReasonCatalogue, group: Group, tally: Tally, targets: list[Target],
    avoidable: np.ndarray,
) -> dict[str, Any]:
    """One groups.csv row (without id, status and share, which tracking adds)."""
    g = group.label
    row: dict[str, Any] = {"label": label_for(group.leading), "events": group.size}
    for rank in range(LEADING_CODES):
        code = group.leading[rank] if rank < len(group.leading) else ""
        mean = float(tally.contribution[g, catalogue.index[code]] / group.size) if code else None
        row[f"code_{rank + 1}"] = code
        row[f"code_{rank + 1}_mean_contribution"] = mean
    row["driver_values"] = _driver_values(catalogue, group, tally.sample_rows[g])
    row["drivers"] = "controllable" if targets else "observable only"
    fix_code = next((c for c in group.leading if catalogue.codes[catalogue.index[c]].fix), "")
    fix = catalogue.codes[catalogue.index[fix_code]].fix if fix_code else None
    row["fix_code"] = fix_code
    row["fix_kind"] = fix.kind if fix else ""
    row["fix_action"] = fix.action if fix else "no fix in the catalogue for these reason codes"
    row["fix_simulated"] = "; ".join(t.describe() for t in targets) or "none (observable only)"
    row["events_avoidable_model_estimate"] = float(avoidable[0])
    row["risk_reduction_model_estimate"] = float(avoidable[1])
    row["first_event"] = _iso(tally.first[g])
    row["last_event"] = _iso(tally.last[g])
    row["top_entities"] = "; ".join(
        f"{name} ({count})" for name, count in tally.entities[g].most_common(TOP_ENTITIES)
    )
    row["example_event_ids"] = "; ".join(e.event_id for e in tally.examples[g])
    return row


def _driver_values(catalogue: ReasonCatalogue, group: Group, values: np.ndarray) -> str:
    """Typical values of the leading codes' features in the group beside the fleet's."""
    parts = []
    seen: set[str] = set()
    for code in group.leading:
        for name in catalogue.codes[catalogue.index[code]].features:
            if name in seen:
                continue
            seen.add(name)
            column = values[:, catalogue.feature_names.index(name)]
            column = column[~np.isnan(column)]
            stats = catalogue.stats[name]
            if column.size == 0:
                typical: object = None
            elif stats.categories is not None:
                most = Counter(column.tolist()).most_common(1)[0][0]
                typical = catalogue.decode(name, float(most))
            else:
                typical = float(np.median(column))
            parts.append(
                f"{name} {format_value(typical)} (fleet {format_value(stats.typical)})"  # type: ignore[arg-type]
            )
    return "; ".join(parts)


def _iso(stamp: pd.Timestamp | None) -> str:
    return "" if stamp is None else stamp.isoformat()


def tally_slice(part: EventSlice, groups: int, explainer: Explainer) -> Tally:
    """What one slice adds to every group's description."""
    explanation = part.explanation
    catalogue = explainer.catalogue
    tally = Tally(groups, len(catalogue.codes), len(catalogue.feature_names))
    tally.events = len(part)
    tally.warned = int(explanation.warned.sum())
    known = part.times.dropna()
    tally.first_event = known.min() if len(known) else None
    tally.last_event = known.max() if len(known) else None
    mix, _ = cause_mix(explanation.code_contributions, catalogue.causes)
    entity = _entity(part)
    weeks = _weeks(part.times)
    for g in range(groups):
        members = np.flatnonzero(part.labels == g)
        if members.size == 0:
            continue
        tally.count[g] = members.size
        tally.mix[g] = mix[members].sum(axis=0)
        tally.contribution[g] = explanation.code_contributions[members].sum(axis=0)
        times = part.times.iloc[members].dropna()
        if len(times):
            tally.first[g], tally.last[g] = times.min(), times.max()
        if entity is not None:
            tally.entities[g] = Counter(str(v) for v in entity.iloc[members] if pd.notna(v))
        tally.examples[g] = _strongest(_examples(part, _top(part, members), explainer))
        tally.sample_keys[g], tally.sample_rows[g] = _bottom(
            part.keys[members], explanation.features[members]
        )
    known = ~pd.isna(weeks)
    tally.weekly.update(zip(weeks[known], part.labels[known].tolist(), strict=True))
    return tally


def avoidable_in_slice(
    bundle: Bundle, part: EventSlice, targets: list[list[Target]], reference: np.ndarray
) -> np.ndarray:
    """Per group, the slice's share of the events its fix would have avoided and of the risk
    reduction (columns 0 and 1; model estimates, see :func:`events_avoidable`)."""
    out = np.zeros((len(targets), 2))
    for g, group_targets in enumerate(targets):
        members = np.flatnonzero(part.labels == g)
        if group_targets and members.size:
            out[g] = events_avoidable(
                bundle, part.events.iloc[members], part.explanation.probability[members],
                group_targets, reference,
            )
    return out


def event_frame(part: EventSlice, group_ids: list[str], ungrouped: str) -> pd.DataFrame:
    """The slice's rows of event_groups.csv, groups named by their tracked ids."""
    explanation = part.explanation
    names = np.array([*group_ids, ungrouped], dtype=object)
    columns: dict[str, object] = {
        "event_id": explanation.ids,
        "group_id": names[np.where(part.labels >= 0, part.labels, len(group_ids))],
        "membership_strength": np.round(part.strength, 4),
        "probability": np.round(explanation.probability, 6),
        "top_reason_codes": explanation.top_codes,
    }
    entity = _entity(part)
    if entity is not None:
        columns["entity"] = entity.astype("string").to_numpy()
    columns["event_time"] = [None if pd.isna(t) else pd.Timestamp(t).isoformat()
                             for t in part.times]
    return pd.DataFrame(columns)


def weekly_frame(
    weekly: Counter[tuple[pd.Timestamp, int]], group_ids: list[str], ungrouped: str
) -> pd.DataFrame:
    """Events per week (rows, Mondays) and group (columns, by id; ungrouped ones too)."""
    if not weekly:
        return pd.DataFrame()
    frame = pd.DataFrame(
        [(week, group_ids[g] if g >= 0 else ungrouped, n) for (week, g), n in weekly.items()],
        columns=["week", "group_id", "events"],
    )
    return frame.pivot_table(index="week", columns="group_id", values="events", aggfunc="sum",
                             fill_value=0).sort_index()


def _entity(part: EventSlice) -> pd.Series | None:
    if part.entity and part.entity in part.events.columns:
        return part.events[part.entity].reset_index(drop=True)
    return None


def _weeks(times: pd.Series) -> np.ndarray:
    """Each event's week (its Monday, UTC, without time zone); NaT where the time is unknown."""
    day = pd.to_datetime(times, utc=True).dt.floor("D")
    monday = day - pd.to_timedelta(day.dt.day_of_week, unit="D")
    return monday.dt.tz_localize(None).to_numpy()


def _top(part: EventSlice, members: np.ndarray) -> np.ndarray:
    """The members :func:`_strongest` would pick from this slice."""
    probability = part.explanation.probability[members]
    order = np.lexsort((-probability, -part.strength[members]))  # stable: input order last
    return members[order[:EXAMPLES]]


def _examples(part: EventSlice, rows: np.ndarray, explainer: Explainer) -> list[Example]:
    """The members at ``rows`` shown in full: their reasons explained again, as they were."""
    if rows.size == 0:
        return []
    again = explainer.explain(part.events.iloc[rows].reset_index(drop=True))
    return [
        Example(
            strength=float(part.strength[row]),
            order=(part.index, int(row)),
            event_id=part.explanation.ids[row],
            probability=float(part.explanation.probability[row]),
            reasons=[(r.code, r.text, r.contribution) for r in reasons],
        )
        for row, reasons in zip(rows.tolist(), again.reasons, strict=True)
    ]


def _strongest(examples: Iterable[Example]) -> list[Example]:
    """Most firmly inside the group first; among equals (many hold strength 1), the events the
    model scored highest, whose reasons show the group's cause most clearly; then input order."""
    return sorted(examples, key=lambda e: (-e.strength, -e.probability, e.order))[:EXAMPLES]


def _bottom(keys: np.ndarray, rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The rows with the :data:`DRIVER_SAMPLE` smallest keys."""
    if keys.size <= DRIVER_SAMPLE:
        return keys, rows
    keep = np.argsort(keys, kind="stable")[:DRIVER_SAMPLE]
    return keys[keep], rows[keep]


def _earliest(a: pd.Timestamp | None, b: pd.Timestamp | None) -> pd.Timestamp | None:
    return b if a is None else a if b is None else min(a, b)


def _latest(a: pd.Timestamp | None, b: pd.Timestamp | None) -> pd.Timestamp | None:
    return b if a is None else a if b is None else max(a, b)
