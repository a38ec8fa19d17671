"""The cheapest change that brings an event below a target probability, exact on tree ensembles.

A tree ensemble is piecewise constant: along one feature the model only changes value where a
split threshold of that feature lies, so between two consecutive thresholds every value scores
the same. The search therefore enumerates, for each controllable feature that may change, the
intervals between its thresholds (with LightGBM's rule: a value equal to a threshold goes
left), and in each interval takes the allowed value nearest the current one (the cheapest, as
costs grow with distance). Every combination of at most ``max_changes`` features and one
interval each is scored in one batch, and the cheapest combination that reaches the target
wins (ties: the lower probability). This is the exhaustive interval search that Cui, Chen, He
& Chen (2015, "Optimal action extraction for random forests and boosted trees", KDD) reduce
to an integer program; enumerating is exact as well, and fast while the product of interval
counts stays in the thousands, as it does for two changes on the models causeline trains.

Categorical features take each allowed value. Observable and context features never move;
a controllable feature moves only as its ``change`` settings allow (range, direction, step).
"""

from __future__ import annotations

import itertools
from collections import Counter
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd

from causeline.service.bundle.load import Bundle
from causeline.service.explain.explainer import Explainer, Explanation
from causeline.service.explain.score import probability
from causeline.service.explain.treeparse import NUMERICAL, Forest, parse_forest
from causeline.service.features.follow import carry
from causeline.service.spec.dataset import ChangeSpec, FeatureSpec

MAX_CHANGES = 2
# Combinations scored per batch: bounds the memory of one event's search.
BATCH = 65_536


@dataclass(frozen=True)
class Change:
    feature: str
    before: float | str | None
    after: float | str


@dataclass(frozen=True)
class Action:
    """The cheapest allowed change found for one event (``changes`` empty: none needed or none
    allowed); ``reached`` says whether it brings the probability below the target."""

    changes: list[Change]
    cost: float
    probability_before: float
    probability_after: float
    reached: bool
    edits: tuple[tuple[int, float], ...] = ()  # (feature position, model value) per change
    reasons_after: list[str] = field(default_factory=list)  # ranked codes after the change
    moved: list[Change] = field(default_factory=list)  # observable followers moved with it

    def apply(self, row: np.ndarray) -> np.ndarray:
        """The model-ready row with this action's changes made."""
        out = row.copy()
        for position, value in self.edits:
            out[position] = value
        return out


# A combination found: its total cost, the probability after, and (feature, option) pairs.
_Found = tuple[float, float, tuple[tuple[int, "_Option"], ...]]


@dataclass(frozen=True)
class _Option:
    """One value a feature may take, as the model sees it (a number or a category code)."""

    value: float
    shown: float | str
    cost: float
    moved: tuple[tuple[int, float], ...] = ()  # followers' values with it (position, value)


@dataclass(frozen=True)
class _Follower:
    position: int
    slope: float
    low: float
    high: float
    thresholds: np.ndarray

    def value(self, row: np.ndarray, driver: int, new: np.ndarray) -> np.ndarray:
        """The follower's value when the driver moves from its value in ``row`` to ``new``."""
        moved = row[self.position] + self.slope * (new - row[driver])
        return np.clip(moved, self.low, self.high)

    def crossings(self, row: np.ndarray, driver: int) -> np.ndarray:
        """Driver values at which the follower crosses one of its split thresholds: with them
        the driver's intervals stay intervals of constant score."""
        now, base = row[driver], row[self.position]
        if np.isnan(now) or np.isnan(base):
            return np.zeros(0)
        return now + (self.thresholds - base) / self.slope


class ActionFinder:
    """Finds actions for events of one bundle; fitted state: the thresholds per feature."""

    def __init__(self, bundle: Bundle, max_changes: int = MAX_CHANGES) -> None:
        if max_changes < 1:
            raise ValueError("max_changes must be at least 1")
        self.bundle = bundle
        self.max_changes = max_changes
        self.names = bundle.spec.feature_names
        self.movable = [(i, f) for i, f in enumerate(bundle.spec.features)
                        if f.role == "controllable" and f.change is not None]
        forest = parse_forest(bundle.booster.dump_model())
        self.thresholds = {i: _thresholds(forest, i) for i, _ in self.movable}
        self.categories = bundle.builder.categories
        # Observable followers of each movable feature (features/follow.py): position,
        # slope, the training range they are kept in, and their own split thresholds.
        stats = bundle.manifest.stats
        self.followers: dict[int, list[_Follower]] = {}
        for i, spec in self.movable:
            for name, rate in (stats[spec.name].follows or {}).items():
                j = self.names.index(name)
                low, high = stats[name].minimum, stats[name].maximum
                self.followers.setdefault(i, []).append(_Follower(
                    j, rate, -np.inf if low is None else low, np.inf if high is None else high,
                    _thresholds(forest, j)))

    def find(self, row: np.ndarray, target: float | None = None) -> Action:
        """The action for one event's model-ready feature row (see the module docstring)."""
        target = self.bundle.manifest.decision.threshold if target is None else target
        before = float(self.probability(row[None, :])[0])
        if before < target or not self.movable:
            return Action([], 0.0, before, before, before < target)
        options = {i: self._options(i, spec, row) for i, spec in self.movable}
        best: _Found | None = None
        fallback: _Found | None = None
        for size in range(1, min(self.max_changes, len(self.movable)) + 1):
            for features in itertools.combinations([i for i, _ in self.movable], size):
                choices = [options[i] for i in features]
                if all(choices):
                    reached, lowest = self._score(row, features, choices, target)
                    if reached is not None and (best is None or reached[:2] < best[:2]):
                        best = reached
                    if fallback is None or (lowest[1], lowest[0]) < (fallback[1], fallback[0]):
                        fallback = lowest
        chosen = best or fallback
        if chosen is None or chosen[1] >= before:
            # Nothing allowed lowers the risk at all: no change to propose.
            return Action([], 0.0, before, before, False)
        cost, after, picks = chosen
        changes = [Change(self.names[i], self.shown(i, row[i]), option.shown)
                   for i, option in picks]
        moved = [Change(self.names[j], self.shown(j, row[j]), float(v))
                 for _, option in picks for j, v in option.moved
                 if not np.isnan(v) and v != row[j]]  # a missing follower stays missing
        edits = tuple((i, option.value) for i, option in picks) + tuple(
            (j, v) for _, option in picks for j, v in option.moved)
        return Action(changes, cost, before, after, best is not None, edits, moved=moved)

    def _score(self, row: np.ndarray, features: tuple[int, ...],
               choices: list[list[_Option]], target: float) -> tuple[_Found | None, _Found]:
        """Every combination of one option per feature: the cheapest that reaches ``target``
        (ties: lower probability; then the first), and the one with the lowest probability."""
        values = [np.array([o.value for o in c]) for c in choices]
        costs = [np.array([o.cost for o in c]) for c in choices]
        follows = [[(j, np.array([dict(o.moved)[j] for o in c])) for j, _ in c[0].moved]
                   for c in choices]
        grids = np.meshgrid(*[np.arange(len(c)) for c in choices], indexing="ij")
        picks = np.stack(grids, axis=-1).reshape(-1, len(features))
        p = np.empty(len(picks))
        for start in range(0, len(picks), BATCH):  # bounded memory per prediction
            batch = picks[start:start + BATCH]
            grid = np.repeat(row[None, :], len(batch), axis=0)
            for column, i in enumerate(features):
                grid[:, i] = values[column][batch[:, column]]
                for j, moved in follows[column]:
                    grid[:, j] = moved[batch[:, column]]
            p[start:start + len(batch)] = self.probability(grid)
        cost = sum(costs[column][picks[:, column]] for column in range(len(features)))

        def found(k: int) -> _Found:
            chosen = tuple((i, choices[column][picks[k, column]])
                           for column, i in enumerate(features))
            return float(cost[k]), float(p[k]), chosen

        reach = np.flatnonzero(p < target)
        reached = found(int(reach[np.lexsort((p[reach], cost[reach]))[0]])) if reach.size \
            else None
        return reached, found(int(np.argmin(p)))

    def probability(self, rows: np.ndarray) -> np.ndarray:
        """Calibrated probabilities of model-ready rows (the search's batches are small, so
        they run on one thread: see :func:`~causeline.service.explain.score.predict_raw`)."""
        return probability(self.bundle, rows)

    def shown(self, i: int, value: float) -> float | str | None:
        if np.isnan(value):
            return None
        names = self.categories.get(self.names[i])
        return names[int(value)] if names is not None else float(value)

    def _options(self, i: int, spec: FeatureSpec, row: np.ndarray) -> list[_Option]:
        now = row[i]
        change = spec.change
        assert change is not None
        if spec.kind == "categorical":
            names = self.categories[spec.name]
            return [_Option(float(names.index(v)), v, change.cost)
                    for v in change.values or () if v in names and names.index(v) != now]
        followers = self.followers.get(i, [])
        if not followers:
            return _numeric_options(self.thresholds[i], now, change)
        cuts = np.unique(np.concatenate([self.thresholds[i], *(
            f.crossings(row, i) for f in followers)]))
        options = _numeric_options(cuts, now, change)
        return [replace(o, moved=tuple(
            (f.position, float(f.value(row, i, np.array(o.value)))) for f in followers))
            for o in options]


def _thresholds(forest: Forest, feature: int) -> np.ndarray:
    chosen = (forest.feature == feature) & (forest.kind == NUMERICAL)
    return np.unique(forest.threshold[chosen])


def _numeric_options(thresholds: np.ndarray, now: float, change: ChangeSpec) -> list[_Option]:
    """Per interval between thresholds, the allowed value nearest ``now`` (none where the
    interval holds no allowed value, or holds ``now`` itself)."""
    low = -np.inf if change.min is None else change.min
    high = np.inf if change.max is None else change.max
    if not np.isnan(now):
        if change.direction == "decrease":
            high = min(high, now)
        elif change.direction == "increase":
            low = max(low, now)
    edges = np.concatenate([[-np.inf], thresholds, [np.inf]])
    out = []
    for lower, upper in itertools.pairwise(edges):
        # The interval (lower, upper]: LightGBM sends x <= threshold left.
        if not np.isnan(now) and lower < now <= upper:
            continue
        start = max(np.nextafter(lower, np.inf), low)
        stop = min(upper, high)
        value = _nearest(start, stop, now, change.step)
        if value is None:
            continue
        distance = 0.0 if np.isnan(now) else abs(value - now)
        cost = change.cost + change.cost_per_unit * distance
        out.append(_Option(value, value, cost))
    return out


def _nearest(start: float, stop: float, now: float, step: float | None) -> float | None:
    """The value in ``[start, stop]`` nearest ``now`` (on ``now``'s grid of ``step``)."""
    if start > stop or (not np.isfinite(start) and not np.isfinite(stop)):
        return None
    if np.isnan(now):
        # No current value: the interval's own edge nearest zero, a plain setting.
        value = start if np.isfinite(start) else stop
        return float(value) if np.isfinite(value) else None
    target = start if now < start else stop
    if not np.isfinite(target):
        return None
    if step is None:
        return float(target)
    k = np.ceil((start - now) / step) if now < start else np.floor((stop - now) / step)
    value = now + k * step
    return float(value) if start <= value <= stop else None


def with_reasons(explainer: Explainer, rows: np.ndarray, actions: list[Action]) -> list[Action]:
    """The actions with the reason codes each event would carry after its change (one
    explanation call for all of them)."""
    changed = [k for k, action in enumerate(actions) if action.changes]
    if not changed:
        return actions
    after = np.vstack([actions[k].apply(rows[k]) for k in changed])
    out = list(actions)
    for k, reasons in zip(changed, explainer.reasons_of(after), strict=True):
        out[k] = replace(actions[k], reasons_after=[r.code for r in reasons])
    return out


class Actions:
    """Per event the action :class:`ActionFinder` found (events below the threshold need none),
    as explain's outputs hold them: columns for a table, one record per event for JSON."""

    def __init__(self, actions: list[Action], needed: np.ndarray) -> None:
        self.actions = actions
        self.needed = needed

    @classmethod
    def find(cls, explainer: Explainer, explanation: Explanation, max_changes: int,
             finder: ActionFinder | None = None) -> Actions:
        """Actions for every event of ``explanation`` at or above the threshold."""
        return cls.of_rows(explainer, explanation.features.values, explanation.probability,
                           max_changes, finder)

    @classmethod
    def of_rows(cls, explainer: Explainer, values: np.ndarray, probability: np.ndarray,
                max_changes: int, finder: ActionFinder | None = None) -> Actions:
        """Actions for model-ready rows whose probabilities are known (no explanation needed:
        only the changed events are explained, for their reason codes after)."""
        finder = finder or ActionFinder(explainer.bundle, max_changes)
        needed = np.asarray(probability) >= explainer.bundle.manifest.decision.threshold
        actions = [finder.find(values[row]) if flag else Action([], 0.0, p, p, True)
                   for row, (flag, p) in enumerate(zip(needed, probability, strict=True))]
        return cls(with_reasons(explainer, values, actions), needed)

    def frame(self) -> pd.DataFrame:
        """Columns for an explain table: the changes, cost, probability and codes after."""
        a = self.actions
        return pd.DataFrame({
            "change": ["; ".join(f"{c.feature} {_text(c.before)} -> {_text(c.after)}"
                                 for c in x.changes) for x in a],
            "moved_with_change": ["; ".join(f"{c.feature} {_text(c.before)} -> {_text(c.after)}"
                                            for c in x.moved) for x in a],
            "change_cost": [x.cost if x.changes else None for x in a],
            "probability_after_change": [x.probability_after if x.changes else None for x in a],
            "change_reaches_threshold": [x.reached for x in a],
            "reason_codes_after_change": ["; ".join(x.reasons_after) for x in a],
        })

    def records(self) -> list[dict[str, Any] | None]:
        """Per event a JSON-ready record (None where the event is below the threshold)."""
        return [action_record(x) if flag else None
                for x, flag in zip(self.actions, self.needed, strict=True)]


def action_record(action: Action) -> dict[str, Any]:
    """One action as JSON: changes (empty when nothing allowed lowers the risk), cost, the
    probability before and after, whether it reaches the target, and the codes after."""
    return {
        "changes": [{"feature": c.feature, "from": c.before, "to": c.after}
                    for c in action.changes],
        "cost": action.cost,
        "probability_before": action.probability_before,
        "probability_after": action.probability_after,
        "reaches_threshold": action.reached,
        "reason_codes_after": action.reasons_after,
        "moved_with": [{"feature": c.feature, "from": c.before, "to": c.after}
                       for c in action.moved],
    }


@dataclass(frozen=True)
class CommonAction:
    """The action most often chosen for a group's events: its changes (the median target of
    each), how often it was chosen, and the share of events it brings below the threshold when
    applied to every examined event of the group (each change only in its allowed direction)."""

    description: str
    chosen_share: float
    below_share: float
    examined: int


def common_action(finder: ActionFinder, rows: np.ndarray) -> CommonAction | None:
    """The most common action over ``rows`` (a sample of one group's events, model-ready);
    None when no examined event is at or above the threshold or none can be moved."""
    threshold = finder.bundle.manifest.decision.threshold
    before = finder.probability(rows) if len(rows) else np.zeros(0)
    flagged = rows[before >= threshold]
    if not len(flagged) or not finder.movable:
        return None
    actions = [finder.find(row) for row in flagged]
    movable = {i for i, _ in finder.movable}

    def kind_of(action: Action) -> tuple[int, ...]:
        return tuple(i for i, _ in action.edits if i in movable)  # followers aside

    kinds = Counter(kind_of(a) for a in actions if a.changes)
    if not kinds:
        return None
    kind, count = kinds.most_common(1)[0]
    targets: dict[int, float] = {}
    for position in kind:
        chosen = [v for a in actions if kind_of(a) == kind
                  for i, v in a.edits if i == position]
        spec = finder.bundle.spec.features[position]
        # Categories: the most chosen value; numbers: the median target.
        targets[position] = (Counter(chosen).most_common(1)[0][0] if spec.kind == "categorical"
                             else float(np.median(chosen)))
    moved = flagged.copy()
    for position, target in targets.items():
        change = finder.bundle.spec.features[position].change
        column = moved[:, position]
        if change is not None and change.direction == "decrease":
            moved[:, position] = np.where(np.isnan(column), target, np.minimum(column, target))
        elif change is not None and change.direction == "increase":
            moved[:, position] = np.where(np.isnan(column), target, np.maximum(column, target))
        else:
            moved[:, position] = target
        for follower in finder.followers.get(position, []):
            carry(flagged, moved, position, follower.position, follower.slope, follower.low,
                  follower.high)
    after = finder.probability(moved)
    description = "; ".join(f"{finder.names[i]} -> {_text(finder.shown(i, t))}"
                            for i, t in targets.items())
    return CommonAction(description, count / len(actions), float(np.mean(after < threshold)),
                        len(actions))


def _text(value: float | str | None) -> str:
    if value is None:
        return "missing"
    if isinstance(value, str):
        return value
    return f"{value:.6g}"
