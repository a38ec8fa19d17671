"""Held-out metrics: ranking, probability quality and the calibration table."""

from __future__ import annotations

import numpy as np
from sklearn.metrics import average_precision_score, brier_score_loss, roc_auc_score


def held_out_metrics(
    y: np.ndarray, p: np.ndarray, threshold: float, bins: int = 10
) -> dict[str, object]:
    """ROC AUC, PR AUC (average precision), Brier score, the decision's counts, and calibration."""
    metrics: dict[str, object] = {"rows": int(y.size), "events": int(y.sum())}
    if 0 < y.sum() < y.size:
        metrics["roc_auc"] = float(roc_auc_score(y, p))
        metrics["pr_auc"] = float(average_precision_score(y, p))
    else:
        metrics["roc_auc"] = metrics["pr_auc"] = None
    metrics["brier"] = float(brier_score_loss(y, p)) if y.size else None
    flagged = p >= threshold
    true_positive = int((flagged & (y == 1)).sum())
    metrics["flagged"] = int(flagged.sum())
    metrics["precision_at_threshold"] = true_positive / flagged.sum() if flagged.any() else None
    metrics["recall_at_threshold"] = true_positive / y.sum() if y.sum() else None
    metrics["calibration"] = calibration_table(y, p, bins)
    return metrics


def calibration_table(y: np.ndarray, p: np.ndarray, bins: int) -> list[dict[str, float]]:
    """Equal-count bins of predicted probability: mean prediction beside the observed rate."""
    if y.size == 0:
        return []
    order = np.argsort(p, kind="stable")
    rows = []
    for part in np.array_split(order, min(bins, y.size)):
        rows.append(
            {
                "low": float(p[part].min()),
                "high": float(p[part].max()),
                "rows": int(part.size),
                "predicted": float(p[part].mean()),
                "observed": float(y[part].mean()),
            }
        )
    return rows
