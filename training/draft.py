"""``draft``: a first config written from the user's own table, to edit rather than to start blank.

Every column but the target, id, time and entity becomes a feature with its inferred kind, its
range and missing share in a comment, ``role: observable`` (the user marks what the team can
set as controllable), and one reason code per feature, or per group of strongly correlated
numeric features, pointing the way the column moves with the target. No fixes: those are the
team's to write. Columns that look like ids or times, or that give the answer away (they
predict the target almost perfectly, or are only filled in for events), are left out with a
comment saying why, so the draft trains as it is.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.stats import spearmanr
from sklearn.metrics import roc_auc_score

from causeline.service.errors import DataError
from causeline.service.files.tables import binary_column, read_table

# A column whose values alone rank events above non-events this well (ROC AUC) gives the
# answer away: known only after the event, most likely. Common practice, not a published rule.
LEAK_AUC = 0.98
# Numeric features this correlated (|Spearman rho|) describe one thing: one reason code.
TOGETHER = 0.9
MAX_CATEGORIES = 50
CORRELATION_SAMPLE = 200_000  # rows the correlations are measured on


@dataclass
class Column:
    """What the draft says of one column."""

    name: str  # feature name (a valid name)
    column: str  # the column in the table
    kind: str = "numeric"
    categories: list[str] = field(default_factory=list)
    note: str = ""  # range, missing share
    left_out: str = ""  # why the column is not a feature
    direction: str = "any"


@dataclass(frozen=True)
class Draft:
    text: str
    features: list[Column]
    left_out: list[Column]


def draft_config(data: Path, target: str, id_column: str | None = None,
                 time: str | None = None, entity: str | None = None) -> Draft:
    """The draft for the table at ``data`` (CSV, JSON lines or Parquet)."""
    table = read_table(Path(data), [c for c in (id_column, entity) if c])
    if len(table) == 0:
        raise DataError(f"{data}: the file has a header but no rows")
    for role, name in (("target", target), ("id", id_column), ("time", time),
                       ("entity", entity)):
        if name is not None and name not in table.columns:
            raise DataError(f"--{role} {name!r} is not a column of {data}; it has "
                            + ", ".join(repr(c) for c in table.columns[:12]))
    y = binary_column(table[target], target, "target").astype(np.int8)
    if y.min() == y.max():
        raise DataError(f"column {target!r} (target) holds one value only; a model needs both "
                        "events and non-events")
    if id_column is None:
        id_column = _find_id(table, target)
    columns = []
    for name in table.columns:
        if name in (target, id_column, time, entity):
            continue
        columns.append(_describe(table[name], y, name))
    features = [c for c in columns if not c.left_out]
    _directions(table, y, features)
    groups = _correlated(table, [c for c in features if c.kind == "numeric"])
    text = _render(Path(data), target, id_column, time, entity, columns, groups, y)
    return Draft(text, features, [c for c in columns if c.left_out])


def write_draft(draft: Draft, out: Path) -> None:
    """Write the draft; an existing file is never overwritten."""
    out = Path(out)
    if out.exists():
        raise DataError(f"{out} exists; the draft never overwrites a file: give another --out")
    out.parent.mkdir(parents=True, exist_ok=True)
    with open(out, "x", encoding="utf-8") as handle:
        handle.write(draft.text)


def _find_id(table: pd.DataFrame, target: str) -> str:
    for name in table.columns:
        column = table[name]
        if name != target and column.notna().all() and column.is_unique and (
                column.dtype.kind in "iuO" or str(column.dtype) in ("string", "str")):
            return str(name)
    raise DataError("no column holds a distinct value on every row; give --id, or add a row "
                    "id column to the table")


def _feature_name(column: str) -> str:
    name = re.sub(r"[^A-Za-z0-9_]+", "_", column.strip()).strip("_").lower()
    name = re.sub(r"_+", "_", name)
    return name if re.match(r"^[A-Za-z_]", name or "0") else f"f_{name}"


def _describe(values: pd.Series, y: np.ndarray, column: str) -> Column:
    out = Column(name=_feature_name(column), column=column)
    present = values.notna().to_numpy()
    missing = 1.0 - present.mean()
    if present.sum() == 0:
        out.left_out = "empty on every row"
        return out
    if missing > 0 and _auc(present.astype(float), y) >= LEAK_AUC:
        out.left_out = (f"filled in for events and not for others (missing on {missing:.0%} "
                        "of rows): known only after the event?")
        return out
    telling = _only_on_events(values, y)
    if telling is not None:
        out.left_out = (f"the value {telling} occurs almost only on events: a flag set after "
                        "the event?")
        return out
    numeric = values.dtype.kind in "biuf"
    if not numeric and _looks_like_time(values):
        out.left_out = "looks like a time; give it as --time if it is the event time"
        return out
    if numeric:
        number = values.astype(float)
        if values.dtype.kind in "iu" and values.is_unique and len(values) > 50:
            out.left_out = "every value distinct, like a row number or id"
            return out
        filled = number.fillna(number.median())
        if _auc(filled.to_numpy(), y) >= LEAK_AUC:
            out.left_out = ("predicts the target almost perfectly on its own: known only after "
                            "the event?")
            return out
        out.note = (f"range {_number(number.min())} to {_number(number.max())}, median "
                    f"{_number(number.median())}, missing {missing:.1%}")
        return out
    text = values.astype("string")
    counts = text.value_counts()
    if len(counts) > MAX_CATEGORIES:
        out.left_out = (f"{len(counts)} distinct values, like an id or free text (a category "
                        f"takes at most {MAX_CATEGORIES})")
        return out
    rate = pd.Series(y).groupby(text.fillna("").to_numpy()).transform("mean").to_numpy()
    if len(counts) > 1 and _auc(rate, y) >= LEAK_AUC:
        out.left_out = ("its categories predict the target almost perfectly: known only after "
                        "the event?")
        return out
    out.kind = "categorical"
    out.categories = [str(c) for c in counts.index]
    out.note = f"{len(counts)} categories, missing {missing:.1%}"
    return out


def _directions(table: pd.DataFrame, y: np.ndarray, features: list[Column]) -> None:
    """Numeric features point where higher values go with events (high) or lower (low)."""
    for feature in features:
        if feature.kind != "numeric":
            continue
        values = table[feature.column].astype(float).to_numpy()
        keep = ~np.isnan(values)
        rho = spearmanr(values[keep], y[keep]).statistic if keep.sum() > 2 else 0.0
        feature.direction = "low" if np.nan_to_num(rho) < 0 else "high"


def _correlated(table: pd.DataFrame, numeric: list[Column]) -> list[list[Column]]:
    """Numeric features in groups whose members correlate at |rho| >= TOGETHER with the
    group's first member (linked in table order), each feature in one group."""
    sample = table.sample(min(len(table), CORRELATION_SAMPLE), random_state=0)
    frame = pd.DataFrame({c.name: sample[c.column].astype(float).to_numpy() for c in numeric})
    rho = frame.corr(method="spearman").abs() if len(numeric) > 1 else None
    groups: list[list[Column]] = []
    placed: set[str] = set()
    for feature in numeric:
        if feature.name in placed:
            continue
        group = [feature]
        placed.add(feature.name)
        for other in numeric:
            if other.name in placed or rho is None:
                continue
            value = rho.loc[feature.name, other.name]
            if np.isfinite(value) and value >= TOGETHER and other.direction == feature.direction:
                group.append(other)
                placed.add(other.name)
        groups.append(group)
    return groups


def _render(data: Path, target: str, id_column: str, time: str | None, entity: str | None,
            columns: list[Column], groups: list[list[Column]], y: np.ndarray) -> str:
    name = re.sub(r"[^A-Za-z0-9_.-]+", "-", data.stem).strip("-") or "events"
    lines = [
        f"# A draft written by `causeline draft` from {data.name}: {len(y):,} rows, "
        f"{int(y.sum()):,} events ({y.mean():.1%}).",
        "# It trains as it is. Before you rely on it: give each feature its unit and a",
        "# description, mark as `role: controllable` what the team can set (a setting, a",
        "# maintenance interval) and as `role: context` what only describes when (calendar,",
        "# history), reword the reason texts, and add a `fix:` to the codes the team can act on.",
        "# docs/config.md describes every key.",
        f"name: {name}",
        f"target: {_yaml(target)}",
        f"id: {_yaml(id_column)}",
    ]
    if time:
        lines.append(f"time: {_yaml(time)}")
    if entity:
        lines.append(f"entity: {_yaml(entity)}")
    lines.append("features:")
    for column in columns:
        if column.left_out:
            lines.append(f"  # left out: {_yaml(column.column)}: {column.left_out}")
            continue
        lines.append(f"  # {column.note}")
        parts = [f"name: {column.name}", "role: observable"]
        if column.name != column.column:
            parts.append(f"column: {_yaml(column.column)}")
        if column.kind == "categorical":
            parts.append("kind: categorical")
            parts.append("categories: [" + ", ".join(_yaml(c) for c in column.categories) + "]")
        else:
            parts.append('unit: ""')
        lines.append("  - {" + ", ".join(parts) + "}")
    lines.append("reason_codes:")
    singles = [[c] for c in columns if not c.left_out and c.kind == "categorical"]
    for group in [*groups, *singles]:
        first = group[0]
        code = re.sub(r"[^A-Z0-9_]", "_", first.name.upper())
        code = code if re.match(r"^[A-Z]", code) else f"C_{code}"
        word = {"high": "high", "low": "low", "any": ""}[first.direction]
        if len(group) > 1:
            together = ", ".join(c.name for c in group[1:])
            lines.append(f"  # {first.name} moves with {together} (|Spearman rho| >= "
                         f"{TOGETHER}): one code for them")
        lines.append(f"  - code: {code}{'_' + word.upper() if word else ''}")
        lines.append("    features: [" + ", ".join(c.name for c in group) + "]")
        lines.append(f"    direction: {first.direction}")
        text = f"{first.name} is {{{first.name}}} (typical {{{first.name}:typical}})"
        lines.append(f"    text: {_yaml(text)}")
    return "\n".join(lines) + "\n"


def _auc(score: np.ndarray, y: np.ndarray) -> float:
    """How well ``score`` alone ranks events first, either way round (0.5 to 1)."""
    if np.unique(score).size < 2:
        return 0.5
    auc = float(roc_auc_score(y, score))
    return max(auc, 1.0 - auc)


def _only_on_events(values: pd.Series, y: np.ndarray) -> str | None:
    """A value of a column with few values (a flag, a code) that 99 % of its rows are events
    and that marks at least 5 % of all events: a column recorded after the event, most likely.
    Continuous columns are left to the AUC rule."""
    counts = values.value_counts()
    if len(counts) > 10 or len(counts) < 2:
        return None
    events = int(y.sum())
    rate = pd.Series(y).groupby(values.to_numpy()).agg(["sum", "count"])
    for value, row in rate.iterrows():
        if row["count"] >= 10 and row["sum"] >= 0.99 * row["count"] \
                and row["sum"] >= 0.05 * events:
            return repr(value.item() if hasattr(value, "item") else value)
    return None


def _looks_like_time(values: pd.Series) -> bool:
    sample = values.dropna().astype(str).head(200)
    if sample.empty or not sample.str.contains(r"\d{4}-\d{2}-\d{2}|\d{1,2}/\d{1,2}/\d{2,4}").all():
        return False
    parsed = pd.to_datetime(sample, errors="coerce", format="mixed")
    return bool(parsed.notna().mean() > 0.9)


def _number(value: float) -> str:
    return f"{value:.4g}" if np.isfinite(value) else "n/a"


def _yaml(text: str) -> str:
    """A YAML scalar, quoted when plain text would be read otherwise."""
    escaped = text.replace("\\", "\\\\").replace('"', '\\"')
    return f'"{escaped}"'
