"""From the window's tallies and the bundle's reference to checks, levels and a verdict.

Every check has an effect size and, where chance could explain it, a p-value. A check reaches
``watch`` or ``retrain`` only when its effect passes the threshold of that level **and** its
p-value is below ``ALPHA`` divided by the number of tests in the run (Bonferroni), so a large
window does not flag tiny differences and many features and codes do not make an unchanged
window noisy. Thresholds (``LIMITS``): PSI 0.1 and 0.25 are common practice in credit scoring;
Cohen's h and d of 0.2 and 0.5 are Cohen's (1988) "small" and "medium" conventions; the shares
outside the training range or in new categories (1 % and 5 %), the ROC AUC drop (0.05, 0.10),
the Brier score's rise against the card's, both as shares of the score of always predicting
the event rate (25 %, 50 %), and the observed-to-predicted ratio (1.25, 1.5) are this
project's choices. The mix of codes among flagged events is reported but does not decide: it
follows the handful of units that score high, and moved by Cohen's h up to 0.4 between two
fresh draws of the same demo process. Features with role ``context`` (calendar, history) and
codes over context features only are reported but do not decide: they move with the calendar by
design.
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from causeline.service.bundle.reference import PartReference, Reference
from causeline.service.drift.stats import (
    RankedScores,
    bootstrap,
    cohen_d,
    cohen_h,
    mean_p_value,
    psi,
    psi_p_value,
    quantile_bins,
    share_p_value,
)
from causeline.service.drift.tally import CodeTally, FeatureTally, ScoreTally

LEVELS = ("ok", "watch", "retrain")
ALPHA = 0.05
MIN_ROWS = 10  # fewer rows outside the range or in new categories than this never flag
LIMITS: dict[str, tuple[float, float]] = {
    "psi": (0.1, 0.25),
    "outside": (0.01, 0.05),
    "new_category": (0.01, 0.05),
    "h": (0.2, 0.5),
    "d": (0.2, 0.5),
    "auc_drop": (0.05, 0.10),
    "brier_rise": (0.25, 0.50),
    "ratio": (1.25, 1.5),
}


@dataclass(frozen=True)
class Units:
    """How many independent units a test may count on each side.

    Rows of one entity (a case, a machine) share its traits: a fleet of 80 cases seen for a
    year is 80 draws of a case's age, not 29,200. Where the spec names an entity, tests count
    at most the distinct entities on each side (conservative for values that change from row
    to row); effect sizes always use every row.

    Without an entity the rows are one series, and neighbours in time share a drifting room
    temperature or a wandering gap: 50,000 runs whose temperature keeps 99.75 % of itself from
    run to run hold about 60 independent draws. ``serial`` then scales each side by the
    subject's ``factor``, independent rows per row in the window by batch means (see
    :class:`~causeline.service.drift.tally.SerialTally`); the reference is taken to share it,
    being the same process.
    """

    window: int | None = None
    reference: int | None = None
    serial: bool = False
    factor: float = 1.0

    def at(self, factor: float) -> Units:
        """The units of one subject whose values have this serial ``factor``."""
        return replace(self, factor=float(factor)) if self.serial else self

    def n(self, rows: int) -> float:
        if self.window is not None:
            return min(rows, self.window)
        return min(rows, max(rows * self.factor, 1.0)) if rows else 0

    def m(self, rows: int) -> float:
        if self.reference is not None:
            return min(rows, self.reference)
        return min(rows, max(rows * self.factor, 1.0)) if rows else 0


@dataclass(frozen=True)
class Finding:
    """One check on one subject (a feature, a code, the scores, calibration)."""

    area: str
    subject: str
    check: str
    value: float
    reference: float | None
    effect: float
    p_value: float | None
    limit: str
    decides: bool

    def level(self, alpha: float) -> str:
        watch, retrain = LIMITS[self.limit]
        size = abs(self.effect)
        if np.isnan(size) or (self.p_value is not None and self.p_value >= alpha):
            return "ok"
        return "retrain" if size >= retrain else "watch" if size >= watch else "ok"


def feature_findings(tally: FeatureTally, reference: Reference,
                     roles: Mapping[str, str], units: Units) -> list[Finding]:
    out: list[Finding] = []
    factors = tally.serial.factor()
    all_units = units
    for position, name in enumerate(tally.names):
        units = all_units.at(factors[position])
        ref = reference.features[name]
        decides = roles.get(name) != "context"
        rows = tally.rows
        new = sum(tally.unseen[name].values())
        missing = tally.missing[position] / max(rows, 1)
        out.append(Finding("features", name, "missing_share", missing, ref.missing_share,
                           cohen_h(missing, ref.missing_share),
                           share_p_value(missing, units.n(rows), ref.missing_share,
                                         units.m(ref.rows)), "h",
                           decides))
        counts = tally.bins[position]
        present = int(counts.sum())
        if present:
            shares = counts / present
            value = psi(np.asarray(ref.shares), shares)
            present_ref = round(ref.rows * (1.0 - ref.missing_share))
            out.append(Finding("features", name, "psi", value, None, value,
                               psi_p_value(value, units.n(present), units.m(present_ref),
                                           len(ref.shares)), "psi",
                               decides))
        if ref.kind == "categorical":
            share = new / max(present + new, 1)
            out.append(Finding("features", name, "new_category_share", share, 0.0,
                               share if new >= MIN_ROWS else 0.0, None, "new_category", decides))
        else:
            outside = int(tally.outside[position])
            share = outside / max(rows, 1)
            out.append(Finding("features", name, "outside_range_share", share, 0.0,
                               share if outside >= MIN_ROWS else 0.0,
                               outside_p_value(share, units.n(rows), units.m(ref.rows)),
                               "outside", decides))
    return out


def outside_p_value(share: float, n: float, m: float) -> float:
    """Chance of this share of ``n`` independent window draws falling outside the range of
    ``m`` reference draws of the same process: each does with chance ``2 / (m + 1)`` (it is
    the largest or the smallest of m + 1 exchangeable draws); a one-sided binomial test."""
    from scipy import stats

    trials = max(1, round(n))
    hits = math.ceil(share * trials - 1e-9)
    if hits == 0:
        return 1.0
    return float(stats.binom.sf(hits - 1, trials, min(1.0, 2.0 / (m + 1.0))))


def code_findings(tally: CodeTally, part: PartReference, code_ids: Sequence[str],
                  causes: np.ndarray, units: Units) -> list[Finding]:
    out: list[Finding] = []
    share, flagged, mean, sd = tally.share(), tally.share_flagged(), tally.mean(), tally.sd()
    factors = tally.serial.factor()
    all_units = units
    for i, code in enumerate(code_ids):
        units = all_units.at(factors[i])
        ref = part.codes.get(code)
        if ref is None:
            continue
        decides = bool(causes[i])
        out.append(Finding("codes", code, "share", share[i], ref.share,
                           cohen_h(share[i], ref.share),
                           share_p_value(share[i], units.n(tally.rows), ref.share,
                                         units.m(part.rows)), "h",
                           decides))
        if tally.flagged and ref.share_flagged is not None:
            out.append(Finding("codes", code, "share_flagged", flagged[i], ref.share_flagged,
                               cohen_h(flagged[i], ref.share_flagged),
                               share_p_value(flagged[i], units.n(tally.flagged),
                                             ref.share_flagged, units.m(part.flagged)), "h",
                               False))
        out.append(Finding("codes", code, "mean_contribution", mean[i], ref.mean_contribution,
                           cohen_d(mean[i], ref.mean_contribution, ref.sd_contribution),
                           mean_p_value(mean[i], sd[i], units.n(tally.rows), ref.mean_contribution,
                                        ref.sd_contribution, units.m(part.rows)), "d", decides))
    return out


def score_findings(tally: ScoreTally, part: PartReference, units: Units) -> list[Finding]:
    units = units.at(tally.serial.factor()[0])
    shares = tally.shares()
    value = psi(np.asarray(part.score_shares), shares)
    above = tally.flagged / max(tally.rows, 1)
    return [
        Finding("scores", "probability", "psi", value, None, value,
                psi_p_value(value, units.n(tally.rows), units.m(part.rows),
                            len(part.score_shares)), "psi", True),
        Finding("scores", "probability", "share_flagged", above, part.share_flagged,
                cohen_h(above, part.share_flagged),
                share_p_value(above, units.n(tally.rows), part.share_flagged,
                              units.m(part.rows)), "h", True),
    ]


@dataclass(frozen=True)
class Calibration:
    """Calibration on labelled events: per decile table and the findings."""

    table: pd.DataFrame
    findings: list[Finding]
    summary: dict[str, object]


def calibration_checks(p: np.ndarray, y: np.ndarray, card: Mapping[str, object],
                       bins: int = 10, replicates: int = 200, seed: int = 0,
                       units: np.ndarray | None = None) -> Calibration:
    """Observed event rate against mean predicted probability per decile of the prediction,
    Brier score and ROC AUC with Poisson-bootstrap intervals, against the model card's;
    ``units`` (each event's entity) makes the bootstrap draw whole entities."""
    ranked = RankedScores(p, y)
    nbins = int(min(bins, p.size))
    binned = quantile_bins(p, nbins)
    auc, brier, rates = bootstrap(ranked, binned, nbins, replicates, seed, units=units)
    counts = np.bincount(binned, minlength=nbins)
    predicted = np.bincount(binned, weights=p, minlength=nbins) / np.maximum(counts, 1)
    table = pd.DataFrame({
        "bin": np.arange(1, nbins + 1), "rows": counts, "mean_predicted": predicted,
        "observed_rate": [r.estimate for r in rates], "observed_low": [r.low for r in rates],
        "observed_high": [r.high for r in rates],
    })[counts > 0]
    findings: list[Finding] = []
    card_auc, card_brier = card.get("roc_auc"), card.get("brier")
    if isinstance(card_auc, float) and not np.isnan(auc.estimate):
        # Only a drop the interval excludes counts; the p-value slot carries that as 0 or 1.
        outside = auc.high < card_auc
        findings.append(Finding("calibration", "model", "roc_auc", auc.estimate, card_auc,
                                card_auc - auc.estimate, 0.0 if outside else 1.0, "auc_drop",
                                True))
    card_rate = _rate(card)
    window_rate = float(y.mean())
    if isinstance(card_brier, float) and card_brier > 0 and card_rate is not None:
        # Brier scores compared as shares of what always predicting the event rate would score
        # (1 - Brier skill score): a fleet with more events has a larger Brier score with no
        # loss of calibration at all.
        card_scaled = card_brier / (card_rate * (1.0 - card_rate))
        spread = window_rate * (1.0 - window_rate)
        outside = brier.low / spread > card_scaled
        findings.append(Finding("calibration", "model", "brier", brier.estimate, card_brier,
                                brier.estimate / spread / card_scaled - 1.0,
                                0.0 if outside else 1.0, "brier_rise", True))
    observed, expected = float(y.mean()), float(p.mean())
    spread = float(np.sqrt(np.sum(p * (1.0 - p)))) / p.size
    from scipy import stats

    p_value = float(2.0 * stats.norm.sf(abs(observed - expected) / spread)) if spread else 1.0
    ratio = observed / expected if expected > 0 else float("nan")
    # A ratio below one counts as far as its inverse: 0.5 is as far off as 2.
    effect = max(ratio, 1.0 / ratio) if ratio > 0 else float("inf")
    findings.append(Finding("calibration", "model", "observed_to_predicted", ratio, 1.0,
                            effect if effect >= 1.0 else 1.0, p_value, "ratio", True))
    summary = {
        "rows": int(p.size), "events": int(y.sum()),
        "roc_auc": _interval(auc), "brier": _interval(brier),
        "card_roc_auc": card_auc, "card_brier": card_brier,
        "observed_rate": observed, "mean_predicted": expected,
        "bootstrap_replicates": replicates,
        "bootstrap_draws": "events" if units is None else "entities",
    }
    return Calibration(table, findings, summary)


def _rate(card: Mapping[str, object]) -> float | None:
    rows, events = card.get("rows"), card.get("events")
    if isinstance(rows, int) and isinstance(events, int) and 0 < events < rows:
        return events / rows
    return None


def _interval(interval) -> dict[str, float]:  # type: ignore[no-untyped-def]
    return {"estimate": interval.estimate, "low": interval.low, "high": interval.high}


@dataclass(frozen=True)
class Verdict:
    level: str
    decided_by: list[dict[str, object]]
    alpha: float
    tests: int


def verdict(findings: Sequence[Finding]) -> Verdict:
    """The worst level among deciding checks, with those checks; Bonferroni over all tests."""
    tests = sum(f.p_value is not None for f in findings)
    alpha = ALPHA / max(tests, 1)
    worst = 0
    decided: list[dict[str, object]] = []
    for finding in findings:
        level = LEVELS.index(finding.level(alpha))
        if finding.decides and level > 0:
            decided.append({"area": finding.area, "subject": finding.subject,
                            "check": finding.check, "value": finding.value,
                            "reference": finding.reference, "effect": finding.effect,
                            "level": LEVELS[level]})
            worst = max(worst, level)
    decided.sort(key=lambda d: (-LEVELS.index(str(d["level"])), str(d["area"])))
    return Verdict(LEVELS[worst], decided, alpha, tests)


def findings_table(findings: Sequence[Finding], alpha: float) -> pd.DataFrame:
    """One row per finding, with its level."""
    return pd.DataFrame([{
        "area": f.area, "subject": f.subject, "check": f.check, "value": f.value,
        "reference": f.reference, "effect": f.effect, "p_value": f.p_value,
        "level": f.level(alpha), "decides": f.decides,
    } for f in findings])


def subject_table(findings: Sequence[Finding], alpha: float, area: str) -> pd.DataFrame:
    """Per subject of one area: each check's value and reference side by side, the worst level
    and the checks that reached it."""
    rows: dict[str, dict[str, object]] = {}
    for f in findings:
        if f.area != area:
            continue
        row = rows.setdefault(f.subject, {area.rstrip("s"): f.subject, "level": "ok",
                                          "flagged_by": "", "also_moved": "",
                                          "decides": f.decides})
        row[f.check] = f.value
        if f.reference is not None:
            row[f"{f.check}_reference"] = f.reference
        level = f.level(alpha)
        if level == "ok":
            continue
        # A check that does not decide (say the mix among flagged events) is shown apart.
        key = "flagged_by" if f.decides else "also_moved"
        row[key] = " ".join(filter(None, [str(row[key]), f"{f.check}({level})"]))
        if f.decides and LEVELS.index(level) > LEVELS.index(str(row["level"])):
            row["level"] = level
    return pd.DataFrame(list(rows.values()))


def top_unseen(counter: Counter[str], limit: int = 5) -> str:
    return "; ".join(f"{value} ({count})" for value, count in counter.most_common(limit))
