"""Group ids that last across runs: match this run's groups to the previous run's.

A group's signature is its mean cause mix (reason code -> share). Two runs' groups are compared
by the cosine similarity of their signatures over the union of their codes, and paired by the
assignment that maximises the total similarity (the Hungarian method, scipy's
``linear_sum_assignment``); a pair below :data:`MATCH_SIMILARITY` is no match. A matched group
keeps its id; a new one takes the next number never used before, so an id always names one
cause. Previous groups left without a partner are listed as gone.
"""

from __future__ import annotations

import json
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from scipy.optimize import linear_sum_assignment

from causeline.service.errors import DataError

SUMMARY = "summary.json"
# Our own choice: the same cause in two runs scores about 0.99, two different causes rarely
# above 0.3 (each signature is dominated by its own leading code).
MATCH_SIMILARITY = 0.7
# A share that moves by less than this fraction of its old value (or by less than one
# percentage point) is 'steady': run-to-run noise, not a trend. A rule of thumb, our own.
RELATIVE_TOLERANCE = 0.2
ABSOLUTE_TOLERANCE = 0.01
_ID = re.compile(r"^G-(\d+)$")


@dataclass(frozen=True)
class PastGroup:
    group_id: str
    share: float
    events: int
    label: str
    signature: dict[str, float]


@dataclass(frozen=True)
class PreviousRun:
    groups: list[PastGroup]
    last_number: int


@dataclass(frozen=True)
class Tracked:
    """Per current group: its id, status and previous share; plus the groups that are gone."""

    ids: list[str]
    status: list[str]
    previous_share: list[float | None]
    gone: list[PastGroup]
    last_number: int


def read_previous(folder: Path) -> PreviousRun:
    """The groups a previous run recorded in its ``summary.json``."""
    path = Path(folder) / SUMMARY
    if not path.is_file():
        raise DataError(f"--previous {folder}: no {SUMMARY}; not a root-cause output folder")
    try:
        data = json.loads(path.read_text("utf-8"))
        groups = [
            PastGroup(
                group_id=str(g["group_id"]),
                share=float(g["share"]),
                events=int(g["events"]),
                label=str(g.get("label", "")),
                signature={str(k): float(v) for k, v in g["signature"].items()},
            )
            for g in data["groups"]
        ]
        last = int(data["last_group_number"])
    except (UnicodeDecodeError, json.JSONDecodeError, KeyError, TypeError, ValueError):
        raise DataError(f"{path}: not a summary this causeline wrote") from None
    return PreviousRun(groups=groups, last_number=last)


def similarity(a: Mapping[str, float], b: Mapping[str, float]) -> float:
    """Cosine similarity of two signatures over the union of their codes."""
    keys = sorted(set(a) | set(b))
    x = np.array([a.get(k, 0.0) for k in keys])
    y = np.array([b.get(k, 0.0) for k in keys])
    norm = float(np.linalg.norm(x) * np.linalg.norm(y))
    return float(x @ y / norm) if norm > 0 else 0.0


def status_of(share: float, previous: float | None) -> str:
    if previous is None:
        return "new"
    change = share - previous
    if abs(change) <= max(RELATIVE_TOLERANCE * previous, ABSOLUTE_TOLERANCE):
        return "steady"
    return "growing" if change > 0 else "shrinking"


def group_id(number: int) -> str:
    return f"G-{number:03d}"


def track(
    signatures: Sequence[Mapping[str, float]],
    shares: Sequence[float],
    previous: PreviousRun | None,
) -> Tracked:
    """Ids and statuses for this run's groups; unmatched ones are numbered largest first."""
    n = len(signatures)
    ids: list[str | None] = [None] * n
    before: list[float | None] = [None] * n
    past = previous.groups if previous else []
    last = previous.last_number if previous else 0
    matched: set[int] = set()
    if n and past:
        score = np.array([[similarity(s, p.signature) for p in past] for s in signatures])
        rows, columns = linear_sum_assignment(score, maximize=True)
        for row, column in zip(rows, columns, strict=True):
            if score[row, column] >= MATCH_SIMILARITY:
                ids[row] = past[column].group_id
                before[row] = past[column].share
                matched.add(int(column))
    # Ids ever handed out may exceed what the previous summary lists (gone groups included).
    for item in past:
        found = _ID.match(item.group_id)
        if found:
            last = max(last, int(found.group(1)))
    for row in sorted(range(n), key=lambda r: -shares[r]):
        if ids[row] is None:
            last += 1
            ids[row] = group_id(last)
    return Tracked(
        ids=[str(i) for i in ids],
        status=[status_of(s, b) for s, b in zip(shares, before, strict=True)],
        previous_share=before,
        gone=[p for i, p in enumerate(past) if i not in matched],
        last_number=last,
    )


def summary_groups(
    ids: Sequence[str],
    shares: Sequence[float],
    events: Sequence[int],
    labels: Sequence[str],
    signatures: Sequence[Mapping[str, float]],
) -> list[dict[str, Any]]:
    """The ``groups`` section of summary.json that the next run reads back."""
    return [
        {
            "group_id": i,
            "label": label,
            "events": int(count),
            "share": float(share),
            "signature": {k: round(float(v), 6) for k, v in signature.items()},
        }
        for i, share, count, label, signature in zip(
            ids, shares, events, labels, signatures, strict=True
        )
    ]
