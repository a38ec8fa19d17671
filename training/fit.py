"""Fitting the trees, the calibration map and the decision threshold."""

from __future__ import annotations

from dataclasses import dataclass

import lightgbm as lgb
import numpy as np
from sklearn.isotonic import IsotonicRegression
from sklearn.linear_model import LogisticRegression

from causeline.service.bundle.manifest import Calibration, Decision
from causeline.training.config import ThresholdSettings, TrainingSettings

BASE_PARAMETERS: dict[str, object] = {
    "objective": "binary",
    "learning_rate": 0.05,
    "num_leaves": 31,
    "min_child_samples": 20,
    "feature_fraction": 0.9,
    "verbosity": -1,
    "deterministic": True,
    "force_row_wise": True,
}


@dataclass(frozen=True)
class FittedTrees:
    booster: lgb.Booster
    best_iteration: int
    parameters: dict[str, object]


def fit_trees(
    x_fit: np.ndarray,
    y_fit: np.ndarray,
    x_valid: np.ndarray,
    y_valid: np.ndarray,
    names: list[str],
    categorical: list[int],
    settings: TrainingSettings,
) -> FittedTrees:
    """Gradient-boosted trees, stopped early on the validation part's log loss."""
    parameters = {**BASE_PARAMETERS, **settings.lightgbm, "seed": settings.seed}
    fit_set = lgb.Dataset(
        x_fit, label=y_fit, feature_name=names, categorical_feature=categorical, free_raw_data=False
    )
    valid_set = lgb.Dataset(x_valid, label=y_valid, reference=fit_set)
    booster = lgb.train(
        parameters,
        fit_set,
        num_boost_round=settings.max_rounds,
        valid_sets=[valid_set],
        valid_names=["valid"],
        callbacks=[lgb.early_stopping(settings.early_stopping_rounds, verbose=False)],
    )
    best = booster.best_iteration or booster.current_iteration()
    # Keep only the trees that early stopping chose, so the text model is what gets served.
    trimmed = lgb.Booster(model_str=booster.model_to_string(num_iteration=best))
    return FittedTrees(trimmed, best, parameters)


def fit_calibration(method: str, raw: np.ndarray, y: np.ndarray) -> Calibration:
    """Platt's sigmoid (Platt 1999) or isotonic regression on the validation part's raw scores."""
    if method == "sigmoid":
        model = LogisticRegression(C=1e6, max_iter=1000)
        model.fit(raw.reshape(-1, 1), y)
        return Calibration(
            method="sigmoid", slope=float(model.coef_[0, 0]), intercept=float(model.intercept_[0])
        )
    iso = IsotonicRegression(out_of_bounds="clip", y_min=0.0, y_max=1.0)
    iso.fit(raw, y)
    return Calibration(
        method="isotonic",
        knots_x=tuple(float(v) for v in iso.X_thresholds_),
        knots_y=tuple(float(v) for v in iso.y_thresholds_),
    )


def choose_threshold(settings: ThresholdSettings, p: np.ndarray, y: np.ndarray) -> Decision:
    """A probability threshold from a cost ratio or a precision target."""
    if settings.cost_ratio is not None:
        # With calibrated probabilities, flagging costs less than missing exactly when
        # p * cost_miss >= (1 - p) * cost_false_alarm, i.e. p >= 1 / (1 + ratio)
        # (Elkan 2001, "The foundations of cost-sensitive learning", theorem 1).
        ratio = settings.cost_ratio
        return Decision(threshold=1.0 / (1.0 + ratio), rule=f"cost_ratio={ratio:g}")
    target = float(settings.precision or 0.0)
    order = np.argsort(-p, kind="stable")
    hits = np.cumsum(y[order])
    precision = hits / np.arange(1, len(order) + 1)
    # The lowest threshold that still meets the target catches the most events.
    candidates = np.flatnonzero(precision >= target)
    if candidates.size == 0:
        best = int(np.argmax(precision))
        return Decision(
            threshold=float(p[order][best]),
            rule=f"precision>={target:g} not reached on validation; best {precision[best]:.3f}",
        )
    last = int(candidates[-1])
    return Decision(threshold=float(p[order][last]), rule=f"precision>={target:g}")
