"""Explanations as output tables: nested records for JSON lines, flat columns for CSV/Parquet."""

from __future__ import annotations

from typing import Any

import pandas as pd

from causeline.service.explain.explainer import Explanation


def explanation_records(
    explanation: Explanation, threshold: float, names: list[str], all_contributions: bool,
    rows: range | None = None,
) -> list[dict[str, Any]]:
    """One JSON-ready record per event (of ``rows`` only, when given)."""
    records = []
    for row in rows if rows is not None else range(len(explanation.ids)):
        event_id = explanation.ids[row]
        record: dict[str, Any] = {
            "id": event_id,
            "probability": float(explanation.probability[row]),
            "decision": bool(explanation.decision[row]),
            "threshold": threshold,
            "reasons": [
                {
                    "code": r.code,
                    "text": r.text,
                    "contribution": r.contribution,
                    "values": r.values,
                }
                for r in explanation.reasons[row]
            ],
            "warnings": explanation.warnings[row],
        }
        if all_contributions:
            record["base_value"] = explanation.contributions.base_value
            record["contributions"] = dict(
                zip(names, explanation.contributions.values[row].tolist(), strict=True)
            )
        records.append(record)
    return records


def explanation_frame(
    explanation: Explanation, threshold: float, names: list[str], top_k: int,
    all_contributions: bool,
) -> pd.DataFrame:
    """Flat columns: ``reason_1`` ... ``reason_k`` with their text and contribution."""
    columns: dict[str, Any] = {
        "id": explanation.ids,
        "probability": explanation.probability,
        "decision": explanation.decision.astype(int),
        "threshold": threshold,
    }
    for rank in range(top_k):
        picked = [r[rank] if rank < len(r) else None for r in explanation.reasons]
        columns[f"reason_{rank + 1}"] = [p.code if p else "" for p in picked]
        columns[f"reason_{rank + 1}_text"] = [p.text if p else "" for p in picked]
        columns[f"reason_{rank + 1}_contribution"] = [p.contribution if p else None for p in picked]
    columns["warnings"] = ["; ".join(w) for w in explanation.warnings]
    if all_contributions:
        columns["base_value"] = explanation.contributions.base_value
        for position, name in enumerate(names):
            columns[f"contribution_{name}"] = explanation.contributions.values[:, position]
    return pd.DataFrame(columns)
