"""The drift job: read the window in chunks, count, check against the reference, write a folder.

Output (written atomically): ``features.csv`` (input drift per feature), ``codes.csv``
(reason-code drift), ``scores.csv`` (the probability's reference deciles, shares on both
sides), ``calibration.csv`` (with outcomes), ``checks.csv`` (every check with its effect,
p-value and level), ``summary.json`` (the verdict and the checks that decided it) and
``report.html``.
"""

from __future__ import annotations

import json
import math
from collections import Counter
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from causeline.service.bundle.load import Bundle
from causeline.service.bundle.reference import Reference, load_reference
from causeline.service.drift import checks
from causeline.service.drift.intake import CHUNK_ROWS, chunks, open_source
from causeline.service.drift.outcomes import FailureOutcomes
from causeline.service.drift.page import CAUTION, write_report
from causeline.service.drift.tally import (
    CodeSample,
    CodeTally,
    FeatureTally,
    Scorer,
    ScoreTally,
)
from causeline.service.errors import DataError
from causeline.service.files.spreadsheet import escape_frame
from causeline.service.files.storage import atomic_directory
from causeline.service.files.tables import binary_column, write_table
from causeline.service.files.window import parse_time
from causeline.service.progress import Progress, Silent

PARTS = {"training": "training", "held-out": "held_out"}
CODE_SAMPLE = 200_000
EXIT_CODES = {"ok": 0, "watch": 10, "retrain": 11}


@dataclass(frozen=True)
class DriftOptions:
    since: str | None = None
    until: str | None = None
    label: str | None = None
    failures: Path | None = None  # outcomes joined from this failure log (timeline bundles)
    against: str = "training"  # which part's codes and scores: training or held-out
    replicates: int = 200
    seed: int = 0
    # Reason codes are computed on a seeded uniform sample of this many events (explaining is
    # what costs); None explains every event. Scores and inputs always count every event.
    code_sample: int | None = CODE_SAMPLE


@dataclass
class DriftResult:
    verdict: checks.Verdict
    summary: dict[str, Any]
    tables: dict[str, pd.DataFrame] = field(default_factory=dict)
    folder: Path | None = None


def run_drift(bundle: Bundle, input_path: Path, out: Path | None, options: DriftOptions,
              progress: Progress | None = None) -> DriftResult:
    """Check the events in ``input_path`` (window applied) against the bundle's reference."""
    progress = progress or Silent()
    reference = load_reference(bundle.path, bundle.manifest.reference)
    part_name = PARTS.get(options.against)
    if part_name is None or part_name not in reference.parts:
        raise DataError(f"--against {options.against!r}: the reference holds "
                        f"{', '.join(k for k, v in PARTS.items() if v in reference.parts)}")
    part = reference.parts[part_name]
    source = open_source(bundle, input_path, parse_time(options.since, "--since"),
                         parse_time(options.until, "--until"))
    spec = bundle.spec
    scorer = Scorer.of(bundle)
    names = spec.feature_names
    stats = bundle.manifest.stats
    low = np.array([-np.inf if stats[n].minimum is None or stats[n].categories is not None
                    else stats[n].minimum for n in names])
    high = np.array([np.inf if stats[n].maximum is None or stats[n].categories is not None
                     else stats[n].maximum for n in names])
    features = FeatureTally(reference.features, names, low, high)
    threshold = bundle.manifest.decision.threshold
    if options.code_sample is not None and options.code_sample < 1:
        raise DataError(f"--code-sample {options.code_sample}: give 0 (every event) or more")
    scores = ScoreTally(np.asarray(part.score_cuts), threshold)
    sample = CodeSample(options.code_sample or 0, options.seed) if options.code_sample else None
    codes = CodeTally(len(scorer.code_ids), threshold)
    categorical = [f for f in spec.features if f.kind == "categorical" and not f.derived]
    text = list(dict.fromkeys([spec.id, *([spec.entity] if spec.entity else []),
                               *(f.source_column for f in categorical)]))
    labelled: list[tuple[np.ndarray, np.ndarray]] = []
    if options.label is not None and options.failures is not None:
        raise DataError("give outcomes once: --label COLUMN or --failures LOG, not both")
    outcomes = None if options.failures is None else FailureOutcomes.of(spec, options.failures)
    entities: set[str] = set()
    holders: list[np.ndarray] = []  # per labelled event, its entity (the bootstrap's unit)
    progress.step("reading and scoring the window")
    for frame in chunks(bundle, source, text):
        matrix = bundle.builder.transform(frame)
        unseen = {f.name: _unseen(frame[f.source_column], bundle.builder.categories[f.name])
                  for f in categorical}
        features.add(matrix.values, unseen)
        holder = None
        if spec.entity is not None and spec.entity in frame.columns:
            holder = frame[spec.entity].astype(str).where(frame[spec.entity].notna(), None)
            entities.update(holder.dropna().unique())
        if sample is None:
            scored = scorer.score(matrix.values)
            codes.add(scored)
            probability = scored.probability
        else:
            probability = scorer.probability(matrix.values)
            sample.add(matrix.values)
        scores.add(probability)
        if options.label is not None:
            if options.label not in frame.columns:
                raise DataError(f"--label {options.label!r}: no such column in {input_path}")
            labelled.append((probability,
                             binary_column(frame[options.label], options.label, "label")))
        if outcomes is not None:
            outcomes.add(frame)
            labelled.append((probability, np.empty(0)))
        if labelled and holder is not None:
            holders.append(holder.to_numpy(dtype=object))
        progress(f"{features.rows} events checked")
    if features.rows == 0:
        window = "" if source.since is None and source.until is None else " in the window"
        raise DataError(f"{input_path}: no events of model {bundle.name!r}{window}")
    if sample is not None:
        progress.step(f"explaining {min(sample.seen, sample.size):,} events for reason codes")
        rows = sample.rows()
        for start in range(0, rows.shape[0], CHUNK_ROWS):
            codes.add(scorer.score(rows[start:start + CHUNK_ROWS]))
    roles = {f.name: f.role for f in spec.features}
    units = checks.Units(len(entities) or None, reference.entities) if spec.entity else \
        checks.Units(serial=True)
    findings = checks.feature_findings(features, reference, roles, units)
    findings += checks.code_findings(codes, part, scorer.code_ids, scorer.catalogue.causes,
                                     units)
    findings += checks.score_findings(scores, part, units)
    calibration, told = None, None
    if labelled:
        p = np.concatenate([pair[0] for pair in labelled])
        # Events of one entity are drawn together; without an entity on every event, alone.
        units = _units(holders) if len(holders) == len(labelled) else None
        if outcomes is not None:
            progress.step("joining outcomes from the failure log")
            y, told = outcomes.labels(options.failures)  # type: ignore[arg-type]
            known = ~np.isnan(y)
            p, y = p[known], y[known]
            units = None if units is None else units[known]
        else:
            y = np.concatenate([pair[1] for pair in labelled]).astype(float)
            told = {"source": "label column", "column": options.label}
        told["calibration"] = ("checked" if 0 < y.sum() < y.size else
                               f"not checked: {int(y.sum())} events among {y.size} outcomes")
        if 0 < y.sum() < y.size:
            progress.step("bootstrapping calibration")
            calibration = checks.calibration_checks(
                p, y, bundle.manifest.metrics, replicates=options.replicates, seed=options.seed,
                units=units)
            findings += calibration.findings
    decided = checks.verdict(findings)
    tables = _tables(findings, decided.alpha, features, scores, part, calibration)
    summary = _summary(bundle, reference, source, options, features.rows, scores, decided,
                       calibration)
    summary["outcomes"] = told
    summary["units"] = {
        "counted": "entities" if spec.entity else "rows, discounted for serial correlation",
        "entities": len(entities) or None, "reference_entities": reference.entities,
        "lowest_serial_factor": None if spec.entity else float(min(
            features.serial.factor().min(initial=1.0), scores.serial.factor().min())),
    }
    summary["codes"] = {"events_explained": codes.rows,
                        "sampled": sample is not None and sample.sampled,
                        "sample_size": options.code_sample, "seed": options.seed}
    summary["window"]["entities"] = len(entities) or None
    result = DriftResult(decided, summary, tables)
    if out is not None:
        caution = CAUTION + (f" {spec.caution}" if spec.caution else "")
        _write(out, result, caution)
        result.folder = Path(out)
    return result


def _units(holders: list[np.ndarray]) -> np.ndarray:
    """Each labelled event's bootstrap unit: its entity, or itself when it names none."""
    units = np.concatenate(holders)
    alone = np.flatnonzero(pd.isna(units))
    units[alone] = [f"\x00{position}" for position in alone]
    return units


def _unseen(column: pd.Series, categories: list[str]) -> Counter[str]:
    text = column.astype("string").str.strip()
    new = text[text.notna() & ~text.isin(categories)]
    return Counter({str(k): int(v) for k, v in new.value_counts().items()})


def _tables(findings: list[checks.Finding], alpha: float, features: FeatureTally,
            scores: ScoreTally, part: Any, calibration: checks.Calibration | None,
            ) -> dict[str, pd.DataFrame]:
    feature_table = checks.subject_table(findings, alpha, "features")
    feature_table["new_categories"] = [checks.top_unseen(features.unseen[n])
                                       for n in feature_table["feature"]]
    serial = dict(zip(features.names, features.serial.factor(), strict=True))
    feature_table["serial_factor"] = [serial[n] for n in feature_table["feature"]]
    cuts = list(part.score_cuts)
    scores = pd.DataFrame({
        "low": [0.0, *cuts], "high": [*cuts, 1.0],
        "reference_share": list(part.score_shares),
        "share": scores.shares(),
    })
    tables = {
        "features": feature_table,
        "codes": checks.subject_table(findings, alpha, "codes"),
        "scores": scores,
        "checks": checks.findings_table(findings, alpha),
    }
    if calibration is not None:
        tables["calibration"] = calibration.table
    return tables


def _summary(bundle: Bundle, reference: Reference, source: Any, options: DriftOptions,
             rows: int, scores: ScoreTally, decided: checks.Verdict,
             calibration: checks.Calibration | None) -> dict[str, Any]:
    return _finite({
        "model": bundle.name, "version": bundle.version,
        "verdict": decided.level, "exit_status": EXIT_CODES[decided.level],
        "decided_by": decided.decided_by,
        "window": {
            "input": str(source.path), "prediction_log": source.from_log,
            "since": None if source.since is None else source.since.isoformat(),
            "until": None if source.until is None else source.until.isoformat(),
            "rows_read": source.read, "events": rows,
            "unreadable_log_lines": source.unreadable, "other_models": source.other_models,
        },
        "reference": {"codes_and_scores": options.against, "rows": reference.rows,
                      "sampled": reference.sampled},
        "scores": {"mean_probability": scores.probability / max(scores.rows, 1),
                   "share_flagged": scores.flagged / max(scores.rows, 1),
                   "threshold": bundle.manifest.decision.threshold},
        "calibration": None if calibration is None else calibration.summary,
        "tests": decided.tests, "alpha_per_test": decided.alpha,
        "limits": {name: {"watch": w, "retrain": r} for name, (w, r) in checks.LIMITS.items()},
        "caution": "Drift says the data or the model's reasons moved since training; it does "
                   "not say why, nor that the model is wrong. Review before retraining.",
    })


def _finite(value: Any) -> Any:
    """NaN and infinity as null: summary.json stays strict JSON."""
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_finite(v) for v in value]
    if isinstance(value, float | np.floating):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, np.integer):
        return int(value)
    return value


def _write(out: Path, result: DriftResult, caution: str) -> None:
    with atomic_directory(Path(out)) as staging:
        for name, table in result.tables.items():
            write_table(escape_frame(table), staging / f"{name}.csv")
        (staging / "summary.json").write_text(
            json.dumps(result.summary, indent=2, ensure_ascii=False, allow_nan=False) + "\n",
            "utf-8")
        write_report(staging / "report.html", result.summary, result.tables, caution)
