"""The explanation of a table of events: scores, contributions and ranked reason codes.

Contributions are exact path-dependent SHAP values (Lundberg, Erion & Lee 2018) in the model's
raw output, log-odds of an event, from the fastest exact engine that supports the model
(``fastshap``, else LightGBM's own in ``treeshap``). Calibration comes after the trees, so
contributions explain the raw score; the calibrated probability is a monotone function of it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from causeline.service.bundle.load import Bundle
from causeline.service.bundle.manifest import FeatureStats
from causeline.service.errors import RowProblem
from causeline.service.explain.fastshap import FastTreeExplainer
from causeline.service.explain.reasons import Reason, ReasonCatalogue
from causeline.service.explain.score import calibrate
from causeline.service.explain.treeshap import Contributions
from causeline.service.features.builder import (
    FeatureMatrix,
    Table,
    column_values,
    table_rows,
)


@dataclass(frozen=True)
class Explanation:
    """Scores and reasons for a table of events, row for row."""

    ids: list[str]
    features: FeatureMatrix
    contributions: Contributions
    probability: np.ndarray
    decision: np.ndarray
    code_contributions: np.ndarray
    reasons: list[list[Reason]]
    warnings: list[list[str]]


class Explainer:
    """Scores events with a bundle and attaches ranked reason codes."""

    def __init__(self, bundle: Bundle, top_k: int | None = None) -> None:
        self.bundle = bundle
        settings = bundle.manifest.explain
        self.top_k = top_k or settings.top_k
        self.min_contribution = settings.min_contribution
        self.catalogue = ReasonCatalogue(bundle.spec, bundle.manifest.stats)
        self.engine = FastTreeExplainer(bundle.booster)
        stats = [bundle.manifest.stats[name] for name in bundle.spec.feature_names]
        # Categorical and range-less features get infinite bounds: never "outside".
        self._low = np.array([_bound(s.minimum, s, -np.inf) for s in stats])
        self._high = np.array([_bound(s.maximum, s, np.inf) for s in stats])
        # A missing value that is a state (no failure logged yet) is no gap to warn about.
        meanings = bundle.spec.missing_meanings
        self._gap = np.array([name not in meanings for name in bundle.spec.feature_names])

    def explain(self, table: Table) -> Explanation:
        """Explain every row; rows with problems are scored with those cells treated as missing."""
        return self.explain_features(self.bundle.builder.transform(table),
                                     _ids(table, self.bundle.spec.id))

    def explain_features(self, matrix: FeatureMatrix, ids: list[str]) -> Explanation:
        """Explain rows already built into features (their ids given), as :meth:`explain` does."""
        contrib = self.engine.contributions(matrix.values)
        probability = calibrate(self.bundle.manifest.calibration, contrib.raw)
        codes = self.catalogue.aggregate(contrib.values, matrix.values)
        reasons = self._reasons(codes, matrix.values)
        return Explanation(
            ids=ids,
            features=matrix,
            contributions=contrib,
            probability=probability,
            decision=probability >= self.bundle.manifest.decision.threshold,
            code_contributions=codes,
            reasons=reasons,
            warnings=self._warnings(matrix),
        )

    def reasons_of(self, values: np.ndarray) -> list[list[Reason]]:
        """Ranked reasons for rows of model-ready feature values (e.g. an event after a
        change), as :meth:`explain` ranks them."""
        contrib = self.engine.contributions(values)
        return self._reasons(self.catalogue.aggregate(contrib.values, values), values)

    def _reasons(self, codes: np.ndarray, values: np.ndarray) -> list[list[Reason]]:
        ranked = self.catalogue.rank(codes, self.top_k, self.min_contribution)
        reason = self.catalogue.reason
        return [[reason(code, value, row) for code, value in events]
                for row, events in zip(values.tolist(), ranked, strict=True)]

    def _warnings(self, matrix: FeatureMatrix) -> list[list[str]]:
        """Per row: cell problems, missing values, and values outside the training range."""
        out: list[list[str]] = [[] for _ in range(matrix.values.shape[0])]
        for problem in matrix.problems:
            out[problem.row].append(_problem_text(problem))
        # The trees send a missing value down the side training chose for it, so a score is
        # always given; an event with few values gets a score resting on little, and says so.
        missing = np.isnan(matrix.values) & self._gap
        if missing.any():
            told = {(problem.row, problem.column) for problem in matrix.problems}
            total = len(matrix.names)
            for row in np.flatnonzero(missing.any(axis=1)).tolist():
                names = [matrix.names[c] for c in np.flatnonzero(missing[row]).tolist()
                         if (row, matrix.names[c]) not in told]
                if names:
                    out[row].append(f"no value for {', '.join(names)} ({len(names)} of {total} "
                                    "features): scored as missing")
        # NaN (missing) compares false, quietly: never outside.
        outside = (matrix.values < self._low) | (matrix.values > self._high)
        for row, position in zip(*np.nonzero(outside), strict=True):
            name = matrix.names[position]
            out[row].append(
                f"{name}={matrix.values[row, position]:.6g} is outside the training range "
                f"[{self._low[position]:.6g}, {self._high[position]:.6g}]"
            )
        return out


def _problem_text(problem: RowProblem) -> str:
    return f"{problem.column}: {problem.message}; scored as missing"


def _bound(value: float | None, stats: FeatureStats, default: float) -> float:
    return default if stats.categories is not None or value is None else value


def _ids(table: Table, id_column: str) -> list[str]:
    if id_column in table:
        values = column_values(table, id_column, text=True)
        return ["" if value is None else str(value) for value in values]
    return [str(position) for position in range(table_rows(table))]
