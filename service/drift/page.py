"""The drift page (``report.html``): the verdict and the checks that decided it, then per area
the numbers a person would rather look at than read, each beside its reference and its limits
(through the report kit)."""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from causeline.service.drift.checks import LIMITS
from causeline.service.report import charts, write_page

CAUTION = (
    "Scores and reason codes are the model's estimates, for qualified staff to review; a drift "
    "verdict says the data or the model's reasons moved, not why, and ok does not say the model "
    "is right. Whatever the verdict, food and equipment safety follow the codes that apply "
    "locally, the equipment maker's instructions and licensed practice."
)
CHECK_NAMES = {
    "psi": "PSI", "missing_share": "share missing", "outside_range_share": "share outside range",
    "new_category_share": "share in new categories", "share": "share of events",
    "share_flagged": "share among flagged events", "mean_contribution": "mean contribution",
    "roc_auc": "ROC AUC", "brier": "Brier score", "observed_to_predicted": "observed / predicted",
}


def write_report(path: Path, summary: dict[str, Any], tables: Mapping[str, pd.DataFrame],
                 caution: str = CAUTION) -> None:
    """Render and write ``report.html`` from a finished run's summary and tables."""
    write_page(path, "drift.html", **context(summary, tables, caution))


def context(summary: dict[str, Any], tables: Mapping[str, pd.DataFrame],
            caution: str = CAUTION) -> dict[str, Any]:
    """Everything the template shows, as plain values and charts."""
    window, scores = summary["window"], summary["scores"]
    checks = tables["checks"]
    features = _order(tables["features"], "psi")
    codes = _order(tables["codes"], "share")
    facts = [("verdict", summary["verdict"]), ("events checked", f"{window['events']:,}")]
    if window.get("entities"):
        facts.append(("entities", f"{window['entities']:,}"))
    facts += [("checks that decide", f"{int(checks['decides'].sum()):,}"),
              ("reaching watch or retrain", f"{len(summary['decided_by']):,}"),
              ("mean probability", f"{scores['mean_probability']:.3f}")]
    return {
        "title": f"Drift check: {summary['model']}",
        "subtitle": _subtitle(summary),
        "facts": facts,
        "caution": caution,
        "verdict": summary["verdict"],
        "exit_status": summary["exit_status"],
        "decided": [_decided(d) for d in summary["decided_by"]],
        "tests": summary["tests"],
        "alpha": summary["alpha_per_test"],
        "psi_chart": _feature_bars(features, "psi", "psi", "PSI per feature", "{:.3f}"),
        "outside_chart": _feature_bars(features[features["outside_range_share"].notna()]
                                       if "outside_range_share" in features else features.iloc[:0],
                                       "outside_range_share", "outside",
                                       "share outside the training range", "{:.1%}"),
        "missing_chart": _missing(features),
        "features": [_subject_row(r, "feature", checks) for r in features.to_dict("records")],
        "codes_chart": charts.bars(
            [_name(r["code"], r["decides"]) for r in codes.to_dict("records")],
            codes["share"], reference=codes["share_reference"], fmt="{:.1%}",
            label="share of events carrying each reason code", value_name="window",
            reference_name="training reference"),
        "codes": [_subject_row(r, "code", checks) for r in codes.to_dict("records")],
        "scores_chart": _score_bars(tables["scores"]),
        "scores": _score_rows(checks),
        "calibration": _calibration(summary, tables.get("calibration"), checks),
        "outcomes": summary.get("outcomes"),
        "limits": LIMITS,
        "counted": (f"{window['entities']:,} entities in the window" if window.get("entities")
                    else "rows that follow one another in time, counted as fewer independent "
                         "draws where neighbours move together (serial_factor in features.csv)"),
        "against": summary["reference"]["codes_and_scores"],
    }


def _subtitle(summary: dict[str, Any]) -> str:
    window = summary["window"]
    source = "prediction log" if window["prediction_log"] else "table"
    span = ""
    if window["since"] or window["until"]:
        span = f", from {window['since'] or 'the start'} until {window['until'] or 'the end'}"
    reference = summary["reference"]
    sampled = "; its codes and scores from a random sample" if reference.get("sampled") else ""
    codes = summary.get("codes") or {}
    explained = (f"; reason codes from a random sample of {codes['events_explained']:,} events"
                 if codes.get("sampled") else "")
    return (f"Model {summary['model']} version {summary['version']}; {source} "
            f"{window['input']}{span}{explained}; against the {reference['codes_and_scores']} "
            f"reference ({reference['rows']:,} training rows{sampled})")


def _order(table: pd.DataFrame, column: str) -> pd.DataFrame:
    """Deciding subjects first, then the largest value of ``column``."""
    if table.empty or column not in table:
        return table
    keyed = table.assign(_decides=~table["decides"].astype(bool),
                         _size=-table[column].fillna(0.0).abs())
    return keyed.sort_values(["_decides", "_size"], kind="stable").drop(
        columns=["_decides", "_size"])


def _name(subject: str, decides: bool) -> str:
    return subject if decides else f"{subject} (context)"


def _feature_bars(features: pd.DataFrame, column: str, limit: str, label: str,
                  fmt: str) -> Any:
    watch, retrain = LIMITS[limit]
    if features.empty or column not in features:
        return charts.bars([], [])
    return charts.bars([_name(r["feature"], r["decides"]) for r in features.to_dict("records")],
                       features[column], fmt=fmt, label=label, value_name="window",
                       marks=[("watch", watch), ("retrain", retrain)])


def _missing(features: pd.DataFrame) -> Any:
    """Missing shares now against the reference, for features missing on either side only."""
    if features.empty:
        return None
    some = features[(features["missing_share"] > 0) | (features["missing_share_reference"] > 0)]
    if some.empty:
        return None
    return charts.bars([_name(r["feature"], r["decides"]) for r in some.to_dict("records")],
                       some["missing_share"], reference=some["missing_share_reference"],
                       fmt="{:.1%}", label="share missing per feature", value_name="window",
                       reference_name="training reference")


def _decided(item: dict[str, Any]) -> dict[str, Any]:
    return {**item, "check_name": CHECK_NAMES.get(str(item["check"]), str(item["check"])),
            "shown": _show(str(item["check"]), item["value"]),
            "shown_reference": _show(str(item["check"]), item["reference"])}


def _show(check: str, value: Any) -> str:
    if value is None or (isinstance(value, float) and not np.isfinite(value)):
        return ""
    if check.endswith("share") or check in ("share", "share_flagged"):
        return f"{100 * float(value):.1f} %"
    return f"{float(value):.3f}" if abs(float(value)) < 100 else f"{float(value):,.0f}"


def _within_chance(checks: pd.DataFrame, area: str, subject: str) -> str:
    """Checks of a subject past their watch limit that the test still put down to chance."""
    rows = checks[(checks["area"] == area) & (checks["subject"] == subject)
                  & (checks["level"] == "ok")]
    return ", ".join(CHECK_NAMES.get(r["check"], r["check"])
                     for r in rows.to_dict("records") if _past(r))


def _limit(check: str) -> str | None:
    return {"psi": "psi", "missing_share": "h", "share": "h", "share_flagged": "h",
            "mean_contribution": "d", "outside_range_share": "outside",
            "new_category_share": "new_category"}.get(check)


def _subject_row(row: dict[str, Any], key: str, checks: pd.DataFrame) -> dict[str, Any]:
    area = f"{key}s"
    return {**row, "name": row[key], "chance": _within_chance(checks, area, row[key]),
            "flagged": _readable(row.get("flagged_by", "")),
            "also": _readable(row.get("also_moved", ""))}


def _readable(flags: Any) -> str:
    """``psi(retrain) share(watch)`` as ``PSI: retrain; share of events: watch``."""
    if not isinstance(flags, str) or not flags:
        return ""
    parts = []
    for item in flags.split():
        check, _, level = item.partition("(")
        parts.append(f"{CHECK_NAMES.get(check, check)}: {level.rstrip(')')}")
    return "; ".join(parts)


def _score_bars(scores: pd.DataFrame) -> Any:
    labels = [f"{i + 1}: {low:.3f} to {high:.3f}" for i, (low, high)
              in enumerate(zip(scores["low"], scores["high"], strict=True))]
    return charts.bars(labels, scores["share"], reference=scores["reference_share"],
                       fmt="{:.1%}", label="share of events per reference decile of the score",
                       value_name="window", reference_name="training reference")


def _score_rows(checks: pd.DataFrame) -> list[dict[str, Any]]:
    rows = checks[checks["area"] == "scores"].to_dict("records")
    names = {"psi": "PSI of the score", "share_flagged": "share at or above the threshold"}
    return [{**r, "check_name": names.get(r["check"], r["check"]),
             "shown": _show(r["check"], r["value"]),
             "shown_reference": _show(r["check"], r["reference"]),
             "chance": "yes" if _past(r) and r["level"] == "ok" else ""} for r in rows]


def _past(row: dict[str, Any]) -> bool:
    """Whether a check's effect passed its watch limit (whatever its test said)."""
    limit = _limit(str(row["check"]))
    effect = abs(float(row["effect"]))
    return limit is not None and bool(np.isfinite(effect)) and effect >= LIMITS[limit][0]


def _calibration(summary: dict[str, Any], table: pd.DataFrame | None,
                 checks: pd.DataFrame) -> dict[str, Any] | None:
    found = summary.get("calibration")
    if table is None or found is None:
        return None
    curve = charts.lines(
        [float(v) for v in table["mean_predicted"]],
        {"observed event rate": table["observed_rate"].tolist()}, diagonal=True,
        label="calibration: observed event rate against mean predicted probability",
        x_name="mean predicted probability (per decile of the prediction)",
        y_name="observed event rate")
    labels = [f"decile {int(b)} ({int(n):,} events)"
              for b, n in zip(table["bin"], table["rows"], strict=True)]
    forest = charts.intervals(
        labels, table["observed_rate"], table["observed_low"], table["observed_high"],
        reference=table["mean_predicted"], label="observed rate per decile with its interval",
        estimate_name="observed rate, 95 % interval", reference_name="mean predicted",
        fmt="{:.3f}")
    rows = checks[checks["area"] == "calibration"].to_dict("records")
    return {"curve": curve, "forest": forest, "summary": found,
            "source": _outcomes(summary.get("outcomes") or {}),
            "checks": [{**r, "check_name": CHECK_NAMES.get(r["check"], r["check"])}
                       for r in rows]}


def _outcomes(told: Mapping[str, Any]) -> str:
    """Where the outcomes came from, in a sentence."""
    if told.get("source") == "failure log":
        left = ("left out" if told.get("censored_as") == "exclude" else "counted as no event")
        return (f"Outcomes joined from the failure log {told['failures']}: an event counts when "
                f"a failure of the predicted types follows within {told['horizon']}, as in "
                f"training; {told['censored']:,} events whose horizon runs past the end of "
                f"observation are {left}.")
    if told.get("column"):
        return f"Outcomes from the column {told['column']}."
    return ""
