"""A bundle's manifest: the spec, what training saw, calibration, threshold and metrics.

The models validate ``manifest.json`` when a bundle loads; unknown keys are errors, so a manifest
written by a newer causeline is refused rather than half-read.
"""

from __future__ import annotations

from typing import Any, Literal

from causeline.service.spec.base import Strict
from causeline.service.spec.dataset import DatasetSpec, ExplainSettings

SCHEMA_VERSION = 1
MANIFEST = "manifest.json"
MODEL = "model.txt"
CARD = "MODEL_CARD.md"
CHECKSUMS = "checksums.sha256"


class FeatureStats(Strict):
    """What training saw of one feature: its range, typical value and categories."""

    minimum: float | None = None
    maximum: float | None = None
    typical: float | str | None = None
    missing_share: float = 0.0
    categories: tuple[str, ...] | None = None
    # A controllable feature's observable followers and their slopes (features/follow.py);
    # None in bundles trained before they were kept.
    follows: dict[str, float] | None = None


class Calibration(Strict):
    """Maps the model's raw score (log-odds) to a calibrated probability."""

    method: Literal["sigmoid", "isotonic"]
    slope: float | None = None
    intercept: float | None = None
    knots_x: tuple[float, ...] | None = None
    knots_y: tuple[float, ...] | None = None


class Decision(Strict):
    """The probability at or above which an event is predicted, and the rule that chose it."""

    threshold: float
    rule: str


class ExplainerInfo(Strict):
    """How contributions are computed; they are in log-odds of the uncalibrated model."""

    method: str
    output: Literal["log-odds"] = "log-odds"
    base_value: float


class Manifest(Strict):
    """Everything needed to score and explain, besides the trees themselves."""

    schema_version: int
    name: str
    version: str
    created: str
    dataset: DatasetSpec
    stats: dict[str, FeatureStats]
    explain: ExplainSettings
    calibration: Calibration
    decision: Decision
    explainer: ExplainerInfo
    metrics: dict[str, Any]
    training: dict[str, Any]
    data_fingerprint: str
    libraries: dict[str, str]
    # The drift reference's file (``reference.py``); None in bundles trained before it was kept.
    reference: str | None = None

    def categories(self) -> dict[str, tuple[str, ...]]:
        return {
            name: stats.categories
            for name, stats in self.stats.items()
            if stats.categories is not None
        }
