"""``build``: from raw timelines (readings, failures, actions, attributes) to a snapshot table.

The building itself is :func:`service.timeline.build_snapshots`, shared with scoring; this
module reads the files, checks the config and writes the table ``train`` consumes.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from service.bundle import sha256_file
from service.errors import ConfigError, DataError
from service.spec import TimelineSpec
from service.tables import read_table, write_table
from service.timeline import TimelineInputs, build_snapshots, label_counts, labelled_table
from training.config import TrainConfig, load_config


@dataclass(frozen=True)
class RawPaths:
    """The raw logs on disk; only the readings are always needed."""

    readings: Path
    events: Path | None = None
    actions: Path | None = None
    attributes: Path | None = None

    def fingerprint(self) -> str:
        """One sha256 over the files' own checksums, in a fixed order."""
        parts = [sha256_file(p) if p else "-" for p in
                 (self.readings, self.events, self.actions, self.attributes)]
        return hashlib.sha256("\n".join(parts).encode()).hexdigest()


@dataclass(frozen=True)
class BuildResult:
    table: pd.DataFrame
    counts: dict[str, int]


def timeline_of(config: TrainConfig) -> TimelineSpec:
    if config.timeline is None:
        raise ConfigError(f"{config.name}: the config has no timeline section")
    return config.timeline


def read_inputs(config: TrainConfig, paths: RawPaths) -> TimelineInputs:
    """Read the raw logs, keeping entity columns as text."""
    spec = timeline_of(config)
    if spec.actions is not None and paths.actions is None:
        raise DataError("the config has an actions section; give the maintenance log (--actions)")
    if spec.attributes is not None and paths.attributes is None:
        raise DataError("the config has an attributes section; give them (--attributes)")

    def read(path: Path | None, entity: str | None) -> pd.DataFrame | None:
        if path is None:
            return None
        return read_table(path, text_columns=[entity] if entity else [])

    return TimelineInputs(
        readings=read(paths.readings, spec.readings.entity),  # type: ignore[arg-type]
        failures=read(paths.events, spec.failures.entity),
        actions=read(paths.actions, spec.actions.entity if spec.actions else None),
        attributes=read(paths.attributes, spec.attributes.entity if spec.attributes else None),
    )


def build_table(config: TrainConfig, inputs: TimelineInputs) -> BuildResult:
    """The labelled snapshot table for ``config`` and the count of each snapshot status."""
    built = build_snapshots(timeline_of(config), inputs)
    return BuildResult(labelled_table(config, built), label_counts(built))


def build(config_path: Path, paths: RawPaths, out: Path) -> BuildResult:
    """Build the snapshot table from the raw logs and write it (CSV, JSONL or Parquet)."""
    config = load_config(config_path)
    result = build_table(config, read_inputs(config, paths))
    write_table(result.table, out)
    return result
