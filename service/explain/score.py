"""Scores: the model's raw log-odds, calibrated probabilities and decisions."""

from __future__ import annotations

import lightgbm as lgb
import numpy as np

from causeline.service.bundle.load import Bundle
from causeline.service.bundle.manifest import Calibration
from causeline.service.explain.treeshap import SMALL_BATCH


def raw_score(bundle: Bundle, features: np.ndarray) -> np.ndarray:
    """The boosted trees' output in log-odds, before calibration."""
    return predict_raw(bundle.booster, features)


def predict_raw(booster: lgb.Booster, features: np.ndarray) -> np.ndarray:
    """A booster's log-odds; small batches on one thread, where OpenMP's start-up costs more
    than the trees."""
    threads = 1 if features.shape[0] <= SMALL_BATCH else 0
    return np.asarray(booster.predict(features, raw_score=True, num_threads=threads),
                      dtype=np.float64)


def calibrate(calibration: Calibration, raw: np.ndarray) -> np.ndarray:
    """Calibrated probability from raw log-odds (both maps are monotone, so ranks are kept)."""
    raw = np.asarray(raw, dtype=np.float64)
    if calibration.method == "sigmoid":
        assert calibration.slope is not None and calibration.intercept is not None
        return _sigmoid(calibration.slope * raw + calibration.intercept)
    assert calibration.knots_x is not None and calibration.knots_y is not None
    return np.interp(raw, calibration.knots_x, calibration.knots_y)


def probability(bundle: Bundle, features: np.ndarray) -> np.ndarray:
    return calibrate(bundle.manifest.calibration, raw_score(bundle, features))


def decide(bundle: Bundle, probabilities: np.ndarray) -> np.ndarray:
    """True where the calibrated probability reaches the bundle's threshold."""
    return np.asarray(probabilities) >= bundle.manifest.decision.threshold


def _sigmoid(values: np.ndarray) -> np.ndarray:
    return np.exp(-np.logaddexp(0.0, -values))
