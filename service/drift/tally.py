"""What the drift checks count, chunk by chunk: sums that add up, so memory stays bounded.

A :class:`Scorer` turns a feature matrix into calibrated probabilities, per-code contributions
and the codes each event carries (the same ranking as the explanations: the ``top_k`` largest
above ``min_contribution``). :class:`FeatureTally`, :class:`ScoreTally` and :class:`CodeTally` add
chunks up; the reference stored at training time and the window checked later are counted by
the same code. :class:`CodeSample` keeps a seeded uniform sample of a window for the codes.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import lightgbm as lgb
import numpy as np

from causeline.service.bundle.load import Bundle
from causeline.service.bundle.manifest import Calibration, FeatureStats
from causeline.service.bundle.reference import CodeReference, FeatureReference, PartReference
from causeline.service.drift.stats import bin_counts
from causeline.service.explain.fastshap import FastTreeExplainer
from causeline.service.explain.reasons import ReasonCatalogue, carried
from causeline.service.explain.score import calibrate, predict_raw
from causeline.service.spec.dataset import DatasetSpec, ExplainSettings


@dataclass(frozen=True)
class Scored:
    """One chunk's scores: probability, per-code contributions and the codes carried."""

    probability: np.ndarray
    codes: np.ndarray  # (events, codes), log-odds
    carried: np.ndarray  # (events, codes), bool


class Scorer:
    """Probabilities and reason codes of a feature matrix, without rendering any text."""

    def __init__(self, booster: lgb.Booster, spec: DatasetSpec, stats: Mapping[str, FeatureStats],
                 calibration: Calibration, settings: ExplainSettings) -> None:
        self.booster = booster
        self.engine = FastTreeExplainer(booster)
        self.catalogue = ReasonCatalogue(spec, stats)
        self.calibration = calibration
        self.top_k = settings.top_k
        self.min_contribution = settings.min_contribution

    @classmethod
    def of(cls, bundle: Bundle) -> Scorer:
        m = bundle.manifest
        return cls(bundle.booster, m.dataset, m.stats, m.calibration, m.explain)

    @property
    def code_ids(self) -> list[str]:
        return self.catalogue.code_ids

    def probability(self, values: np.ndarray) -> np.ndarray:
        """Calibrated probabilities alone: the trees' raw output, no explanation (cheap)."""
        return calibrate(self.calibration, predict_raw(self.booster, values))

    def score(self, values: np.ndarray) -> Scored:
        contributions = self.engine.contributions(values)
        codes = self.catalogue.aggregate(contributions.values, values)
        return Scored(calibrate(self.calibration, contributions.raw), codes,
                      carried(codes, self.top_k, self.min_contribution))


BATCH_ROWS = 250  # consecutive rows per batch of the batch-means estimate
GROUPS = 20  # batches are merged into this many consecutive groups


@dataclass
class SerialTally:
    """How many independent rows a series of rows is worth, by batch means: the spread of the
    means of consecutive groups of rows against the spread of single rows (a standard estimate
    of the variance of a mean under serial correlation, whatever its form). Sums are kept per
    batch of ``BATCH_ROWS`` rows as chunks arrive; missing values are skipped."""

    columns: int
    rows: int = 0
    batches: list[np.ndarray] = field(default_factory=list)  # (3, columns): count, sum, squares
    shift: np.ndarray | None = None
    pending: np.ndarray | None = None

    def add(self, values: np.ndarray) -> None:
        values = np.asarray(values, dtype=float).reshape(len(values), self.columns)
        if values.shape[0] == 0:
            return
        if self.shift is None:
            self.shift = np.nan_to_num(values[0])
        values = values - self.shift
        self.rows += values.shape[0]
        if self.pending is not None:
            values = np.vstack([self.pending, values])
        whole = values.shape[0] // BATCH_ROWS * BATCH_ROWS
        for start in range(0, whole, BATCH_ROWS):
            self.batches.append(_sums(values[start:start + BATCH_ROWS]))
        self.pending = values[whole:] if whole < values.shape[0] else None

    def factor(self) -> np.ndarray:
        """Independent rows per row, at most 1 (1 where the series is too short to tell)."""
        sums = list(self.batches) + ([_sums(self.pending)] if self.pending is not None else [])
        if len(sums) < 5:
            return np.ones(self.columns)
        groups = np.stack([np.sum(part, axis=0) for part in
                           np.array_split(np.stack(sums), min(GROUPS, len(sums)))])
        count, total, squares = groups[:, 0], groups[:, 1], groups[:, 2]
        n = count.sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = total.sum(axis=0) / n
            row_var = squares.sum(axis=0) / n - mean**2
            group_mean = total / count
            # Variance of a group's mean, scaled to one row: count-weighted over the groups.
            spread = np.nansum(count * (group_mean - mean) ** 2, axis=0) / (
                (count > 0).sum(axis=0) - 1)
            inflation = spread / row_var
        inflation = np.where(np.isfinite(inflation), np.maximum(inflation, 1.0), 1.0)
        return 1.0 / inflation


def _sums(values: np.ndarray) -> np.ndarray:
    present = ~np.isnan(values)
    filled = np.where(present, values, 0.0)
    return np.stack([present.sum(axis=0), filled.sum(axis=0), (filled * filled).sum(axis=0)])


@dataclass
class ScoreTally:
    """Sums over events of the calibrated probability: rows, flagged, and counts per reference
    decile of the score. Cheap, so every event of a window is counted."""

    score_cuts: np.ndarray
    threshold: float
    rows: int = 0
    flagged: int = 0
    probability: float = 0.0
    bins: np.ndarray = field(init=False)
    serial: SerialTally = field(init=False)

    def __post_init__(self) -> None:
        self.bins = np.zeros(self.score_cuts.size + 1, dtype=np.int64)
        self.serial = SerialTally(1)

    def add(self, probability: np.ndarray) -> None:
        self.serial.add(probability[:, None])
        self.rows += probability.size
        self.flagged += int((probability >= self.threshold).sum())
        self.bins += bin_counts(probability, self.score_cuts)
        self.probability += float(probability.sum())

    def shares(self) -> np.ndarray:
        return self.bins / max(self.rows, 1)


@dataclass
class CodeTally:
    """Sums over explained events of each code's presence and contribution."""

    codes: int
    threshold: float
    rows: int = 0
    flagged: int = 0
    carried: np.ndarray = field(init=False)
    carried_flagged: np.ndarray = field(init=False)
    total: np.ndarray = field(init=False)
    squares: np.ndarray = field(init=False)
    serial: SerialTally = field(init=False)

    def __post_init__(self) -> None:
        self.carried = np.zeros(self.codes, dtype=np.int64)
        self.carried_flagged = np.zeros(self.codes, dtype=np.int64)
        self.total = np.zeros(self.codes)
        self.squares = np.zeros(self.codes)
        self.serial = SerialTally(self.codes)

    def add(self, scored: Scored) -> None:
        """A chunk of explained events, in the order they were read."""
        self.serial.add(scored.carried)
        flagged = scored.probability >= self.threshold
        self.rows += scored.probability.size
        self.flagged += int(flagged.sum())
        self.carried += scored.carried.sum(axis=0)
        self.carried_flagged += scored.carried[flagged].sum(axis=0)
        self.total += scored.codes.sum(axis=0)
        self.squares += np.square(scored.codes).sum(axis=0)

    def share(self) -> np.ndarray:
        return self.carried / max(self.rows, 1)

    def share_flagged(self) -> np.ndarray:
        return self.carried_flagged / max(self.flagged, 1)

    def mean(self) -> np.ndarray:
        return self.total / max(self.rows, 1)

    def sd(self) -> np.ndarray:
        n = max(self.rows, 1)
        return np.sqrt(np.maximum(self.squares / n - np.square(self.total / n), 0.0))


def reference_part(codes: CodeTally, scores: ScoreTally, code_ids: Sequence[str]) -> PartReference:
    """Both tallies of the same events as a stored reference part."""
    share, flagged, mean, sd = codes.share(), codes.share_flagged(), codes.mean(), codes.sd()
    return PartReference(
        rows=codes.rows, flagged=codes.flagged,
        codes={code: CodeReference(
            share=float(share[i]),
            share_flagged=float(flagged[i]) if codes.flagged else None,
            mean_contribution=float(mean[i]), sd_contribution=float(sd[i]),
        ) for i, code in enumerate(code_ids)},
        score_cuts=tuple(float(c) for c in scores.score_cuts),
        score_shares=tuple(float(s) for s in scores.shares()),
        mean_probability=scores.probability / max(scores.rows, 1),
        share_flagged=scores.flagged / max(scores.rows, 1),
    )


class CodeSample:
    """A seeded uniform random sample of at most ``size`` rows of a stream of chunks, without
    replacement (each row gets a uniform key; the ``size`` smallest keys are kept), so the
    costly explanations run on a fixed number of events however long the window."""

    def __init__(self, size: int, seed: int = 0) -> None:
        self.size = size
        self.rng = np.random.default_rng(seed)
        self.keys = np.empty(0)
        self.positions = np.empty(0, dtype=np.int64)
        self.values: np.ndarray | None = None
        self.seen = 0

    def add(self, values: np.ndarray) -> None:
        positions = np.arange(self.seen, self.seen + values.shape[0])
        self.seen += values.shape[0]
        keys = self.rng.random(values.shape[0])
        if self.values is None:
            self.values = values[:0]
        keys, values = np.concatenate([self.keys, keys]), np.concatenate([self.values, values])
        positions = np.concatenate([self.positions, positions])
        if keys.size > self.size:
            keep = np.argpartition(keys, self.size - 1)[:self.size]
            keys, values, positions = keys[keep], values[keep], positions[keep]
        self.keys, self.values, self.positions = keys, values, positions

    @property
    def sampled(self) -> bool:
        return self.seen > self.size

    def rows(self) -> np.ndarray:
        """The sampled rows, in the order they were read (serial correlation is measured on
        them as the codes' checks count them)."""
        if self.values is None:
            return np.empty((0, 0))
        return self.values[np.argsort(self.positions, kind="stable")]


@dataclass
class FeatureTally:
    """Per feature: rows, missing values, counts per reference bin or category, values outside
    the training range, and values of categories training never saw."""

    references: Mapping[str, FeatureReference]
    names: Sequence[str]
    low: np.ndarray
    high: np.ndarray
    rows: int = 0
    missing: np.ndarray = field(init=False)
    outside: np.ndarray = field(init=False)
    bins: list[np.ndarray] = field(init=False)
    unseen: dict[str, Counter[str]] = field(init=False)
    serial: SerialTally = field(init=False)

    def __post_init__(self) -> None:
        self.serial = SerialTally(len(self.names))
        self.missing = np.zeros(len(self.names), dtype=np.int64)
        self.outside = np.zeros(len(self.names), dtype=np.int64)
        self.bins = [np.zeros(len(self.references[n].shares), dtype=np.int64) for n in self.names]
        self.unseen = {name: Counter() for name in self.names}

    def add(self, values: np.ndarray, unseen: Mapping[str, Counter[str]]) -> None:
        """A chunk's feature matrix, and per categorical feature the unknown values it held
        (the feature builder reads those as missing; here they count as new, not missing)."""
        self.rows += values.shape[0]
        self.serial.add(values)
        with np.errstate(invalid="ignore"):
            self.outside += ((values < self.low) | (values > self.high)).sum(axis=0)
        missing = np.isnan(values).sum(axis=0)
        for position, name in enumerate(self.names):
            reference = self.references[name]
            column = values[:, position]
            new = sum(unseen.get(name, Counter()).values())
            self.unseen[name].update(unseen.get(name, Counter()))
            self.missing[position] += missing[position] - new
            if reference.kind == "categorical":
                present = column[~np.isnan(column)].astype(np.int64)
                self.bins[position] += np.bincount(present, minlength=len(reference.shares))
            else:
                self.bins[position] += bin_counts(column, np.asarray(reference.cuts))


def feature_reference(values: np.ndarray, kind: str, categories: int) -> FeatureReference:
    """One column's reference: decile bins (numeric) or category shares, and missing share."""
    from causeline.service.drift.stats import decile_cuts

    present = values[~np.isnan(values)]
    missing = 1.0 - present.size / max(values.size, 1)
    if kind == "categorical":
        counts = np.bincount(present.astype(np.int64), minlength=categories)
        return FeatureReference(kind=kind, rows=int(values.size), missing_share=missing,
                                shares=tuple(float(s) for s in counts / max(present.size, 1)))
    cuts = decile_cuts(values)
    counts = bin_counts(values, cuts)
    return FeatureReference(kind=kind, rows=int(values.size), missing_share=missing,
                            cuts=tuple(float(c) for c in cuts),
                            shares=tuple(float(s) for s in counts / max(present.size, 1)))
