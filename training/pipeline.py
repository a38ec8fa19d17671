"""``train``: from an event table and its config to a verified bundle.

table -> checks -> features -> split -> trees -> calibration -> threshold -> metrics -> bundle.
"""

from __future__ import annotations

import json
import platform
from dataclasses import dataclass
from datetime import UTC, datetime
from importlib import metadata
from pathlib import Path

import lightgbm as lgb
import numpy as np
import pandas as pd

from causeline.service.bundle.load import load_bundle
from causeline.service.bundle.manifest import (
    CARD,
    CHECKSUMS,
    MANIFEST,
    MODEL,
    SCHEMA_VERSION,
    ExplainerInfo,
    Manifest,
)
from causeline.service.bundle.reference import REFERENCE, Reference
from causeline.service.drift.reference import build_reference
from causeline.service.drift.tally import Scorer
from causeline.service.errors import DataError
from causeline.service.explain.fastshap import FastTreeExplainer
from causeline.service.explain.score import calibrate
from causeline.service.explain.treeshap import contributions
from causeline.service.features.builder import FeatureBuilder, FeatureMatrix
from causeline.service.features.follow import follower_slopes
from causeline.service.files.checksum import checksum_text, sha256_file
from causeline.service.files.storage import atomic_directory
from causeline.service.files.tables import read_table
from causeline.training.build import RawPaths, build_table, read_inputs
from causeline.training.card import model_card
from causeline.training.checks import (
    check_columns,
    check_events,
    check_features,
    feature_stats,
    labels,
    learn_categories,
    parse_times,
)
from causeline.training.config import TrainConfig, load_config
from causeline.training.evaluate import held_out_metrics
from causeline.training.fit import choose_threshold, fit_calibration, fit_trees
from causeline.training.split import Split, split_rows

LIBRARIES = ("causeline", "lightgbm", "numpy", "pandas", "scikit-learn", "shap")


@dataclass(frozen=True)
class TrainResult:
    path: Path
    manifest: Manifest
    notes: tuple[str, ...] = ()  # what building snapshots from raw logs had to say


def train(config_path: Path, data_path: Path, out: Path) -> TrainResult:
    """Train on ``data_path`` as ``config_path`` describes and write the bundle to ``out``."""
    config = load_config(config_path)
    table = read_table(data_path, text_columns=[config.id])
    if len(table) == 0:
        raise DataError(f"{data_path}: the file has a header but no rows")
    manifest, model_text, reference = fit_bundle(
        config, table, fingerprint=sha256_file(Path(data_path)))
    write_bundle(out, manifest, model_text, reference)
    # Load what was written, so a bundle that would not load is never reported as trained.
    bundle = load_bundle(out)
    return TrainResult(path=Path(out), manifest=bundle.manifest)


def train_timeline(config_path: Path, paths: RawPaths, out: Path) -> TrainResult:
    """Train straight from raw timelines: build the snapshot table, then as :func:`train`."""
    config = load_config(config_path)
    built = build_table(config, read_inputs(config, paths))
    manifest, model_text, reference = fit_bundle(
        config, built.table, paths.fingerprint(), built.counts)
    write_bundle(out, manifest, model_text, reference)
    bundle = load_bundle(out)
    return TrainResult(path=Path(out), manifest=bundle.manifest, notes=tuple(built.notes))


def fit_bundle(
    config: TrainConfig, table: pd.DataFrame, fingerprint: str,
    snapshot_counts: dict[str, int] | None = None,
) -> tuple[Manifest, str, Reference]:
    """Everything ``train`` does short of writing files: the manifest, the text model and the
    drift reference (the data as the model saw it, for ``causeline drift``).

    ``snapshot_counts``: the counts of a table built from timelines, for the model card."""
    builder = FeatureBuilder(config.features, learn_categories(table, config))
    check_columns(table, config, builder)
    y = labels(table, config.target)
    check_events(y, config.training.min_events)
    matrix = builder.transform(table)
    check_features(matrix, config)
    times = parse_times(table, config.time) if config.time else None
    entities = table[config.entity] if config.entity else None
    split = split_rows(config.training.split, y, times, entities, config.training.seed)
    for part, rows in (("the fit part", split.fit), ("the validation part", split.valid)):
        check_events(y[rows], max(5, config.training.min_events // 5), part)
    x = matrix.values
    categorical = [i for i, f in enumerate(config.features) if f.kind == "categorical"]
    trees = fit_trees(
        x[split.fit], y[split.fit], x[split.valid], y[split.valid],
        builder.names, categorical, config.training,
    )
    raw_valid = _raw(trees.booster, x[split.valid])
    calibration = fit_calibration(config.training.calibration, raw_valid, y[split.valid])
    p_valid = calibrate(calibration, raw_valid)
    decision = choose_threshold(config.training.threshold, p_valid, y[split.valid])
    p_test = calibrate(calibration, _raw(trees.booster, x[split.test]))
    created = datetime.now(UTC)
    base_value = contributions(trees.booster, x[:1]).base_value
    stats = feature_stats(matrix, builder.categories)
    spec = config.dataset_spec()
    for name, follows in follower_slopes(spec, builder.names, x).items():
        stats[name] = stats[name].model_copy(update={"follows": follows})
    reference = build_reference(
        Scorer(trees.booster, spec, stats, calibration, config.explain), spec,
        builder.categories, x, split.test, decision.threshold, config.training.seed,
        entities=None if entities is None else int(entities.nunique()),
    )
    manifest = Manifest(
        schema_version=SCHEMA_VERSION,
        name=config.name,
        version=f"{created:%Y%m%d.%H%M%S}-{fingerprint[:8]}",
        created=created.isoformat(timespec="seconds"),
        dataset=spec,
        # Ranges and typical values describe all the data the model was built from: with a
        # time split, the fit part alone would call every later month 'out of range'.
        stats=stats,
        explain=config.explain,
        calibration=calibration,
        decision=decision,
        explainer=ExplainerInfo(
            method=FastTreeExplainer(trees.booster).engine, base_value=base_value
        ),
        metrics=held_out_metrics(y[split.test], p_test, decision.threshold),
        training={
            "rows": int(y.size),
            "events": int(y.sum()),
            "split": split.summary(),
            "best_iteration": trees.best_iteration,
            "parameters": {k: v for k, v in trees.parameters.items() if k != "verbosity"},
            **({"labels": snapshot_counts} if snapshot_counts else {}),
            **_held_out(times, split, matrix, builder.categories),
        },
        data_fingerprint=fingerprint,
        libraries=_libraries(),
        reference=REFERENCE,
    )
    return manifest, trees.booster.model_to_string(), reference


def _held_out(times: pd.Series | None, split: Split, matrix: FeatureMatrix,
              categories: dict[str, list[str]]) -> dict[str, object]:
    """The held-out rows' time range, and the features whose held-out values the fit part never
    saw (share of held-out rows outside its range, or in a category it did not hold)."""
    out: dict[str, object] = {}
    if times is not None and split.test.size:
        held = times.iloc[split.test]
        out["held_out_times"] = {"first": held.min().isoformat(), "last": held.max().isoformat()}
    outside: dict[str, float] = {}
    fit, test = matrix.values[split.fit], matrix.values[split.test]
    for column, name in enumerate(matrix.names):
        seen, new = fit[:, column], test[:, column]
        seen, new = seen[~np.isnan(seen)], new[~np.isnan(new)]
        if seen.size == 0 or new.size == 0:
            continue
        if name in categories:
            share = float(np.mean(~np.isin(new, np.unique(seen))))
        else:
            share = float(np.mean((new < seen.min()) | (new > seen.max())))
        if share >= 0.01:
            outside[name] = round(share, 4)
    if outside:
        out["held_out_outside_training"] = outside
    return out


def _raw(booster: lgb.Booster, x: np.ndarray) -> np.ndarray:
    return np.asarray(booster.predict(x, raw_score=True), dtype=np.float64)


def _libraries() -> dict[str, str]:
    versions = {"python": platform.python_version()}
    for name in LIBRARIES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "unknown"
    return versions


def write_bundle(out: Path, manifest: Manifest, model_text: str, reference: Reference) -> None:
    """Write all files into a staging folder, checksum them, then move it into place."""
    out = Path(out)
    if out.exists() and not (out / CHECKSUMS).is_file():
        raise DataError(f"{out} exists and is not a bundle; refusing to replace it")
    with atomic_directory(out) as staging:
        (staging / MODEL).write_text(model_text, "utf-8")
        (staging / MANIFEST).write_text(
            json.dumps(manifest.model_dump(mode="json"), indent=2, allow_nan=False) + "\n",
            "utf-8",
        )
        (staging / CARD).write_text(model_card(manifest), "utf-8")
        (staging / REFERENCE).write_text(
            json.dumps(reference.model_dump(mode="json"), allow_nan=False) + "\n", "utf-8")
        (staging / CHECKSUMS).write_text(
            checksum_text(staging, [MANIFEST, MODEL, CARD, REFERENCE]), "utf-8")
