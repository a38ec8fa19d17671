"""Root-cause groups: events that share a mix of reasons, with a suggested fix per group.

Embedding. Each event's SHAP contributions are summed per catalogue reason code (log-odds). Only
the positive part is kept, because a reason is what raises the risk; a code that lowers it is
no part of why the event happened. Each row is then divided by its L1 norm, so the vector is
the event's *mix* of causes (shares that add up to one), not the size of its score: a leak that
pushed one case to 0.9 and another to 0.2 is the same cause, and should land in the same group.
Without the division, HDBSCAN would split events by how strongly they were predicted. Rows with
no positive contribution have no cause to share and are ungrouped.

Clustering. HDBSCAN (Campello, Moulavi & Sander 2013; the ``hdbscan`` library of McInnes,
Healy & Astels) finds groups of any shape and leaves out points in no dense region instead of
forcing them into a group; those are reported under :data:`UNGROUPED`, never dropped. The
smallest group grows with the number of events (:func:`default_min_cluster_size`), so a large
run does not shatter into hundreds of tiny groups. ``prediction_data`` is kept so later events
can be placed into existing groups.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import hdbscan
import numpy as np

UNGROUPED = "G-UNGROUPED"
# Density is judged over a few neighbours only: cause mixes form tight blobs, and a larger
# value declares the thinner edges of those blobs noise.
MIN_SAMPLES = 3
# A code is a leading code of a group when it holds at least this share of the group's mix.
LEADING_SHARE = 0.10
LEADING_CODES = 3
TOP_ENTITIES = 5
EXAMPLES = 3

Progress = Callable[[str], None]


def default_min_cluster_size(events: int) -> int:
    """Smallest group: 1 % of the events, at least 10 and at most 500.

    Common practice rather than a published rule: a fixed floor keeps a handful of look-alike
    events from becoming a 'cause', the proportional part keeps big runs readable, and the cap
    keeps a genuine cause that hits 0.5 % of a million events visible.
    """
    return int(min(500, max(10, round(0.01 * events))))


def cause_mix(code_contributions: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Positive code contributions divided by their row sum, and which rows have any."""
    positive = np.clip(np.nan_to_num(code_contributions), 0.0, None)
    total = positive.sum(axis=1)
    has_cause = total > 0
    mix = np.zeros_like(positive)
    mix[has_cause] = positive[has_cause] / total[has_cause, None]
    return mix, has_cause


class GroupFinder:
    """HDBSCAN over cause mixes; ``labels_`` is -1 for ungrouped events."""

    def __init__(self, min_cluster_size: int | None = None, min_samples: int = MIN_SAMPLES) -> None:
        self.min_cluster_size = min_cluster_size
        self.min_samples = min_samples

    def fit(self, mix: np.ndarray, has_cause: np.ndarray | None = None) -> GroupFinder:
        n = mix.shape[0]
        has_cause = np.ones(n, dtype=bool) if has_cause is None else has_cause
        rows = np.flatnonzero(has_cause)
        size = self.min_cluster_size or default_min_cluster_size(rows.size)
        self.min_cluster_size_ = int(size)
        self.min_samples_ = int(min(self.min_samples, max(1, rows.size - 1)))
        self.labels_ = np.full(n, -1, dtype=np.int64)
        self.strength_ = np.zeros(n, dtype=np.float64)
        self.clusterer_: hdbscan.HDBSCAN | None = None
        if rows.size <= size:
            # Too few events for even one group of the minimum size: all are ungrouped.
            return self
        clusterer = hdbscan.HDBSCAN(
            min_cluster_size=self.min_cluster_size_,
            min_samples=self.min_samples_,
            prediction_data=True,
        ).fit(mix[rows])
        self.clusterer_ = clusterer
        self.labels_[rows] = clusterer.labels_
        self.strength_[rows] = np.where(clusterer.labels_ >= 0, clusterer.probabilities_, 0.0)
        return self


@dataclass(frozen=True)
class Group:
    """One group as found in this run, before it gets its tracked id; ``label`` is HDBSCAN's."""

    label: int
    size: int
    signature: dict[str, float]
    leading: list[str]


def find_groups(mix_sums: np.ndarray, counts: np.ndarray, codes: Sequence[str]) -> list[Group]:
    """Per HDBSCAN cluster (rows of the summed mixes): mean mix (signature) and leading codes."""
    out = []
    for cluster, size in enumerate(counts.tolist()):
        if size == 0:
            continue
        mean = mix_sums[cluster] / size
        order = np.argsort(-mean, kind="stable")[:LEADING_CODES]
        leading = [codes[i] for i in order if mean[i] >= LEADING_SHARE] or [codes[order[0]]]
        signature = {codes[i]: float(mean[i]) for i in np.flatnonzero(mean > 0)}
        out.append(Group(label=cluster, size=int(size), signature=signature, leading=leading))
    return out


def label_for(leading: Sequence[str]) -> str:
    """A readable name from the leading codes, e.g. 'condenser fouled + store warm'."""
    return " + ".join(
        " ".join(code.removeprefix("F_").lower().replace("_", " ").split()) for code in leading[:2]
    )
