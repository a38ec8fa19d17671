"""What-if for a group: apply the catalogue's fix targets to its events and re-score them.

Of a group's events, which happened, the events avoidable are those the fix would have
prevented: per event the share (p - p') / p of its probability that the fix removes, summed
(:func:`events_avoidable`). It is a model estimate, not a promise: the model learned
associations, not causes.

A catalogue code groups the features of one mechanism, e.g. days since the coil was cleaned
(controllable) with the discharge pressure a dirty coil drives up (observable). Setting the
controllable one alone would leave the model looking at the same high pressure and understate
the fix, so observable numeric features that share a code with a fixed feature move with it:
along the least-squares line fitted over the training rows and kept in the bundle (a numeric
setting that may change, the same line the what-to-change search uses), else over the
reference rows, or by the difference of their means between the old and the new category (a
categorical one). That is a
linear, associational assumption, and it is why the number is labelled an estimate.

Only codes whose fix carries targets count; a group driven by observable features alone has
nothing to simulate.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
import pandas as pd

from causeline.service.bundle.load import Bundle
from causeline.service.explain.reasons import ReasonCatalogue, format_value
from causeline.service.explain.score import probability
from causeline.service.features.follow import carry, slope
from causeline.service.files.tables import to_numbers

How = Literal["cap", "floor", "set"]


@dataclass(frozen=True)
class Target:
    """One fix setting: cap a ``high`` driver, floor a ``low`` one, or set a value outright."""

    feature: str
    value: float | str
    how: How
    code: str

    def describe(self) -> str:
        sign = {"cap": "<=", "floor": ">=", "set": "="}[self.how]
        return f"{self.feature} {sign} {format_value(self.value)}"


def fix_targets(catalogue: ReasonCatalogue, codes: Sequence[str]) -> list[Target]:
    """The targets the fixes of ``codes`` bring, first code first; a feature is set once."""
    out: dict[str, Target] = {}
    for code_id in codes:
        code = catalogue.codes[catalogue.index[code_id]]
        if code.fix is None:
            continue
        for feature, value in code.fix.targets.items():
            if feature in out:
                continue
            how: How = "set"
            # A numeric target on the code's own driver only moves values on the bad side.
            if isinstance(value, int | float) and feature in code.features:
                how = {"high": "cap", "low": "floor"}.get(code.direction, "set")  # type: ignore[assignment]
            out[feature] = Target(feature, value, how, code.code)
    return list(out.values())


def _moved(values: np.ndarray, target: Target) -> np.ndarray:
    value = float(target.value)  # type: ignore[arg-type]
    if target.how == "cap":
        return np.where(values > value, value, values)
    if target.how == "floor":
        return np.where(values < value, value, values)
    return np.where(np.isnan(values), values, value)


def fixed_features(
    bundle: Bundle,
    table: pd.DataFrame,
    targets: Sequence[Target],
    reference: np.ndarray | None = None,
) -> np.ndarray:
    """The feature matrix with targets applied to raw columns, derived features recomputed.

    ``reference`` (a feature matrix, typically of every input row) is what co-driver shifts are
    fitted on; without it, observable co-drivers keep their values.
    """
    spec = bundle.spec
    raw = table.copy()
    derived: list[Target] = []
    for target in targets:
        feature = spec.feature(target.feature)
        if feature.derived:
            derived.append(target)
            continue
        column = feature.source_column
        if feature.kind == "categorical":
            raw[column] = pd.Series(str(target.value), index=raw.index, dtype="string")
            continue
        numbers = to_numbers(raw[column]).to_numpy(dtype=np.float64)
        raw[column] = _moved(numbers, target)
    matrix = bundle.builder.transform(raw).values
    # A derived target (say, power) has no single raw column to set, so it is set directly.
    for target in derived:
        position = spec.feature_names.index(target.feature)
        matrix[:, position] = _moved(matrix[:, position], target)
    if reference is not None:
        before = bundle.builder.transform(table).values
        _follow(bundle, targets, before, matrix, reference)
    return matrix


def _follow(
    bundle: Bundle,
    targets: Sequence[Target],
    before: np.ndarray,
    after: np.ndarray,
    reference: np.ndarray,
) -> None:
    """Move observable co-drivers of each fixed feature along with it (in place on ``after``).

    A numeric feature whose followers the bundle keeps (the training rows' slopes and range,
    :mod:`~causeline.service.features.follow`) moves those, as the what-to-change search does,
    so both answer the same what-if; other targets fit their co-drivers on ``reference``."""
    spec = bundle.spec
    names = spec.feature_names
    codes = {code.code: code for code in bundle.spec.reason_codes}
    stats = bundle.manifest.stats
    for target in targets:
        fixed = names.index(target.feature)
        categorical = spec.feature(target.feature).kind == "categorical"
        kept = None if categorical else stats[target.feature].follows
        if kept is not None:
            for other, rate in kept.items():
                low, high = stats[other].minimum, stats[other].maximum
                carry(before, after, fixed, names.index(other), rate,
                      -np.inf if low is None else low, np.inf if high is None else high)
            continue
        for other in codes[target.code].features:
            feature = spec.feature(other)
            if other == target.feature or feature.role != "observable" or feature.kind != "numeric":
                continue
            column = names.index(other)
            present = reference[:, column][~np.isnan(reference[:, column])]
            if not present.size:
                continue
            low, high = present.min(), present.max()
            if categorical:
                shift = _category_shift(reference[:, fixed], reference[:, column],
                                        before[:, fixed], after[:, fixed])
                after[:, column] = np.clip(before[:, column] + shift, low, high)
            else:
                carry(before, after, fixed, column,
                      slope(reference[:, fixed], reference[:, column]), low, high)


def _category_shift(
    ref_code: np.ndarray, ref_value: np.ndarray, old: np.ndarray, new: np.ndarray
) -> np.ndarray:
    means: dict[float, float] = {}
    for code in np.unique(ref_code[~np.isnan(ref_code)]):
        values = ref_value[(ref_code == code) & ~np.isnan(ref_value)]
        if values.size:
            means[float(code)] = float(values.mean())
    shift = np.zeros(old.shape[0])
    for row, (a, b) in enumerate(zip(old, new, strict=True)):
        if a != b and float(a) in means and float(b) in means:
            shift[row] = means[float(b)] - means[float(a)]
    return shift


def events_avoidable(
    bundle: Bundle,
    table: pd.DataFrame,
    before: np.ndarray,
    targets: Sequence[Target],
    reference: np.ndarray | None = None,
) -> tuple[float, float]:
    """What ``targets`` would have changed for these events, two ways (model estimates):

    - events avoidable: the sum over events of (p - p') / p, each event's probability of
      necessity under monotonicity (Tian & Pearl 2000; among exposed cases, the attributable
      fraction of epidemiology, Miettinen 1974): of these events, which happened, how many the
      fix would have prevented;
    - risk reduction: the sum of p - p', how many fewer events a replay of these same rows would
      produce, which is smaller because a replay would produce only sum(p) events at all.

    p is the calibrated probability as scored, p' the same with the targets applied; a fix that
    would raise an event's risk counts 0 for it, not less.
    """
    if not targets or len(table) == 0:
        return 0.0, 0.0
    p = np.asarray(before, dtype=np.float64)
    after = probability(bundle, fixed_features(bundle, table, targets, reference))
    drop = np.clip(p - after, 0.0, None)
    necessity = np.where(p > 0, drop / np.where(p > 0, p, 1.0), 0.0)
    return float(necessity.sum()), float(drop.sum())
