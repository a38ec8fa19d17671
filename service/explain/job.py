"""The local ``causeline explain`` job: a table (or a timeline bundle's raw logs) in, one file of
explanations out, and the counts the command prints.

The output's kind follows its suffix: CSV (formula-like cells escaped for spreadsheets), JSON
lines (nested reason records) or Parquet. Unreadable input rows go to a rejects file beside the
output; rows with one bad cell are scored with it as missing and a warning, since dropping them
could hide an alert. The Dask engine renders its partitions with the same :func:`rendered`.
"""

from __future__ import annotations

import json
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

import numpy as np
import pandas as pd

from causeline.service.bundle.load import Bundle
from causeline.service.errors import CauselineError
from causeline.service.explain.explainer import Explainer, Explanation
from causeline.service.explain.records import explanation_frame, explanation_records
from causeline.service.features.logs import RawPaths, read_inputs
from causeline.service.features.snapshots import current_features, snapshot_features
from causeline.service.files.rejects import (
    Lenient,
    empty_rejects,
    read_lenient,
    rejects_path,
    write_rejects,
)
from causeline.service.files.spreadsheet import escape_frame
from causeline.service.files.storage import atomic_file
from causeline.service.files.tables import table_format, write_table


@dataclass
class ExplainTotals:
    """What the command prints after an explain run: counts, not rows."""

    rows: int = 0
    flagged: int = 0
    warned: int = 0
    leading: Counter[str] = field(default_factory=Counter)
    rejected: int = 0
    down: int = 0  # entities down at the moment scored, set apart (``--latest``)

    def add(self, explanation: Explanation) -> None:
        """Count one explained table: events, flagged ones, warnings and leading codes."""
        self.rows += len(explanation.ids)
        self.flagged += int(explanation.decision.sum())
        self.warned += sum(1 for w in explanation.warnings if w)
        self.leading.update(
            reasons[0].code
            for reasons, flagged in zip(explanation.reasons, explanation.decision, strict=True)
            if reasons and flagged
        )


class ChangeOutput(Protocol):
    """What to change per event, as a table's columns and as JSON records (None: not needed).
    Made by the actions subpackage, which builds on this one."""

    def frame(self) -> pd.DataFrame: ...

    def records(self) -> list[dict[str, Any] | None]: ...


def rendered(
    explanation: Explanation, explainer: Explainer, kind: str, all_contributions: bool,
    changes: ChangeOutput | None = None,
) -> Any:
    """The explanation as its output kind holds it: JSON lines as text, else a table;
    ``changes`` (one per event) adds what to change."""
    bundle = explainer.bundle
    threshold = bundle.manifest.decision.threshold
    names = bundle.spec.feature_names
    if kind == "jsonl":
        records = explanation_records(explanation, threshold, names, all_contributions)
        if changes is not None:
            for record, change in zip(records, changes.records(), strict=True):
                record["what_to_change"] = change
        return "".join(json.dumps(r, ensure_ascii=False) + "\n" for r in records)
    frame = explanation_frame(explanation, threshold, names, explainer.top_k, all_contributions)
    if changes is not None:
        frame = pd.concat([frame.reset_index(drop=True), changes.frame()], axis=1)
    return escape_frame(frame) if kind == "csv" else frame


def explain_file(
    bundle: Bundle,
    out: Path,
    table_path: Path | None = None,
    raw: RawPaths | None = None,
    top: int | None = None,
    all_contributions: bool = False,
    latest: bool = False,
    as_of: str | None = None,
    changes: Callable[[Explanation], ChangeOutput] | None = None,
) -> ExplainTotals:
    """Explain a table file, or the snapshots built from raw logs, into ``out``.

    Raw logs go through the same build as ``causeline build``, so scores match training's
    features exactly. ``latest`` scores each entity once, at the latest moment its logs know of
    (or at ``as_of``); entities that are down then are not scored but listed in
    ``<out stem>.down.csv`` (:func:`down_path`). ``changes`` adds columns per event (what to
    change, from :mod:`causeline.service.actions`, which the command line passes in).
    """
    out = Path(out)
    kind = table_format(out)
    if (table_path is None) == (raw is None):
        raise CauselineError("give either --input or the raw logs (--readings, --failures, ...)")
    if (latest or as_of is not None) and raw is None:
        raise CauselineError("--latest and --as-of need the raw logs (--readings, ...)")
    down = None
    if raw is not None:
        inputs = read_inputs(bundle.spec, raw)
        if latest or as_of is not None:
            current = current_features(bundle.spec, inputs, as_of)
            table, down = current.table, current.down
        else:
            table = snapshot_features(bundle.spec, inputs)
        read = Lenient(table, np.arange(1, len(table) + 1), empty_rejects(table.columns))
    else:
        assert table_path is not None
        read = read_lenient(table_path, text_columns=[bundle.spec.id])
        table = read.table
    explainer = Explainer(bundle, top_k=top)
    explanation = explainer.explain(table)
    proposed = changes(explanation) if changes is not None else None
    output = rendered(explanation, explainer, kind, all_contributions, proposed)
    if kind == "jsonl":
        with atomic_file(out) as temporary, open(temporary, "w", encoding="utf-8") as handle:
            handle.write(output)
    else:
        write_table(output, out)
    write_rejects(read.rejects, rejects_path(out))
    totals = ExplainTotals(rejected=len(read.rejects))
    if down is not None:
        write_table(escape_frame(down), down_path(out))
        totals.down = len(down)
    totals.add(explanation)
    return totals


def down_path(out: Path) -> Path:
    """Where ``--latest`` lists the entities it did not score: ``scores.csv`` ->
    ``scores.down.csv``."""
    out = Path(out)
    name = out.name
    for suffix in (".gz", ".csv", ".jsonl", ".parquet"):
        name = name.removesuffix(suffix)
    return out.with_name(f"{name}.down.csv")
