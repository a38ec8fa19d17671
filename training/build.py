"""``build``: from raw timelines (readings, failures, actions, attributes) to a snapshot table.

The building itself is :func:`causeline.service.features.snapshots.build_snapshots`, shared
with scoring; this module reads the files, checks the config and writes the table ``train``
consumes.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from causeline.service.errors import ConfigError
from causeline.service.features.logs import RawPaths, TimelineInputs, read_inputs
from causeline.service.features.snapshots import (
    build_snapshots,
    coverage_notes,
    label_counts,
    labelled_table,
)
from causeline.service.files.tables import write_table
from causeline.service.spec.timeline import TimelineSpec
from causeline.training.config import TrainConfig, load_config


@dataclass(frozen=True)
class BuildResult:
    table: pd.DataFrame
    counts: dict[str, int]
    notes: list[str]


def timeline_of(config: TrainConfig) -> TimelineSpec:
    if config.timeline is None:
        raise ConfigError(f"{config.name}: the config has no timeline section")
    return config.timeline


def build_table(config: TrainConfig, inputs: TimelineInputs) -> BuildResult:
    """The labelled snapshot table for ``config`` and the count of each snapshot status."""
    built = build_snapshots(timeline_of(config), inputs)
    return BuildResult(labelled_table(config, built), label_counts(built),
                       coverage_notes(timeline_of(config), built))


def build(config_path: Path, paths: RawPaths, out: Path) -> BuildResult:
    """Build the snapshot table from the raw logs and write it (CSV, JSONL or Parquet)."""
    config = load_config(config_path)
    result = build_table(config, read_inputs(config, paths))
    write_table(result.table, out)
    return result


def describe_counts(counts: dict[str, int]) -> str:
    """One line of snapshot counts, down ones by the rule that excluded them."""
    down = "; ".join(f"{key.removeprefix('down: ')}: {value}" for key, value in counts.items()
                     if key.startswith("down: ") and value)
    main = "  ".join(f"{key}: {value}" for key, value in counts.items()
                     if not key.startswith("down: "))
    return main + (f" ({down})" if down else "")
