"""Root-cause groups: events that share a mix of causes, one group per cause.

Cause mix. Each event's SHAP contributions are summed per catalogue reason code (log-odds).
Only codes that describe a condition of the equipment take part: codes whose features all have
``role: context`` (calendar, earlier failures, time since the last one) stay reason codes for
the score but are left out here, because they come with events of every cause and would split
one cause by season or history ("condenser fouled" and "condenser fouled + failures before").
Only the positive part is kept, a reason being what raises the risk, and each row is divided by
its sum, so the vector is the event's *mix* of causes (shares that add up to one), not the size
of its score. An event with no positive cause contribution has no cause to share and stays
ungrouped.

Groups. Distances between mixes are total variation, half the L1 distance: the share of the mix
two events do *not* have in common. Groups are found in four steps:

1. candidates: HDBSCAN (Campello, Moulavi & Sander 2013; the ``hdbscan`` library of McInnes,
   Healy & Astels 2017) on the mixes of at most :data:`FIT_SAMPLE` events, so the number of
   groups need not be known and a mix of two causes that recurs becomes a group of its own.
   HDBSCAN alone splits one cause into several dense blobs and calls the thinner rest noise (on
   held-out data ARI fell to 0.35-0.46 with up to 43 % ungrouped), so its clusters are only
   candidates, each summed up by its mean mix, the group's *profile*;
2. one cause, one group: profiles that share at least 65 % of their mix (distance at most
   :data:`MERGE_DISTANCE`), or whose two leading codes are the same, are merged;
3. every event joins the profile nearest to its own mix when they share at least 30 % of it
   (distance at most :data:`ASSIGN_DISTANCE`); profiles are re-estimated as the mean mix of
   their members and events re-assigned, as in k-means (Lloyd 1982), until the profiles stop
   moving (at most :data:`REFINE_ROUNDS` rounds). Profiles with fewer members than the smallest
   group are dropped. A profile whose members' cause codes did not on average raise their odds
   by half (:data:`MIN_LIFT`) is no cause: the model saw little that raised those events' risk,
   and a group would be named after noise. Such a profile is *held*: it keeps its events, which
   stay ungrouped, rather than handing them to the nearest cause. An event is left ungrouped
   when its mix matches no profile that far, its nearest profile is held, or it has no cause;
4. a fringe parted: each cause's members are split in two (two-means by the same distance,
   as a step of bisecting k-means) and refined again; the split is kept only when the parts
   stay apart and one of them is held, so a cause is parted from a fringe of events of no
   clear cause that its starting candidate had taken in, and never split into two causes.
   Whether HDBSCAN offers such a fringe as a candidate of its own depends on the sample; this
   step finds such a fringe when two-means does (not always: docs/scaling.md).

Why held profiles and rounds to a fixed point: where most events have no clear cause (every
run of a machine taken as an event, say), their mixes fill the space between the causes. When
groups of them were dissolved during the rounds and their events passed on, big diffuse groups
swallowed real causes and were dissolved in turn, round after round; the profiles never
settled, and a fixed number of rounds froze one moment of that drift. On 10^6 AI4I-style
events, one round more or less moved the groups of a fit on every event to ARI 0.81 against
themselves, and a fit on a 20,000-event sample agreed with it at ARI 0.92. Holding no-cause
profiles and refining to a fixed point, the two fits agreed at ARI 0.972-0.997 over three seeds,
and with step 4 at 0.974-0.997; on the display-case fleet (2 x 10^5 events) at 0.942-0.945,
and with step 4 at 0.942-0.999: the fits can settle on different fixed points, one of them
parting a fringe from a cause that the other joins to it (docs/scaling.md). That is why the
sample is 60,000 events: over 20 draws in three domains its worst agreement was 0.954.

Profiles are found on a sample drawn by a hash of the event ids and read in that hash's order,
so the same events give the same groups in any row order, and both engines fit the same
profiles on the same sample. Placing the other events is a pure function of the profiles, so
the Dask engine does it on its workers. Measured on fresh simulations with planted causes in
three domains and on the public AI4I file (``bench/grouping.py``; README, root-cause groups).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import hdbscan
import numpy as np
import pandas as pd

UNGROUPED = "G-UNGROUPED"
# Events the profiles are found on; the rest are placed by the nearest profile. Chosen by the
# worst seed of sample against full fit over three domains (docs/scaling.md): 60,000 kept ARI
# >= 0.95 in all 20 draws, 20,000 missed in 2. HDBSCAN's fit grows faster than linearly;
# 60,000 mixes take 10-50 s on one core.
FIT_SAMPLE = 60_000
# HDBSCAN's density estimate: neighbours per point. Larger smooths the blobs within a cause.
MIN_SAMPLES = 10
# Total variation distances, 0 (same mix) to 1 (nothing in common).
MERGE_DISTANCE = 0.35
ASSIGN_DISTANCE = 0.70
# Rounds of re-estimating profiles, at most; the fit stops earlier when the profiles stop moving
# (34 on 2 x 10^5 and on 10^6 AI4I-style events, seed 41).
REFINE_ROUNDS = 100
# A group is a cause only when its cause codes raise its events' odds by half on average
# (log-odds ln 1.5): below that the model saw little that raised their risk, and a "group" would
# be named after noise (groups of unexplained events measured 0.06-0.25; weak genuine causes,
# door traffic seen through a daily mean, 0.6). Such events stay ungrouped: no clear cause.
MIN_LIFT = float(np.log(1.5))
# Bisecting steps after the first refining, at most.
MAX_SPLITS = 10
# A sampled fit never asks HDBSCAN for groups smaller than this.
SAMPLED_MIN_GROUP = 5
# A code is a leading code of a group when it holds at least this share of the group's mix.
LEADING_SHARE = 0.10
LEADING_CODES = 3
TOP_ENTITIES = 5
EXAMPLES = 3



def default_min_group_size(events: int) -> int:
    """Smallest group: 1 % of the events, at least 10 and at most 500.

    Common practice rather than a published rule: a fixed floor keeps a handful of look-alike
    events from becoming a 'cause', the proportional part keeps big runs readable, and the cap
    keeps a genuine cause that hits 0.5 % of a million events visible.
    """
    return int(min(500, max(10, round(0.01 * events))))


def cause_mix(
    code_contributions: np.ndarray, causes: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Positive contributions of the cause codes divided by their row sum, and which rows have
    any; ``causes`` marks the codes that take part (default: all), the others get share 0."""
    positive = np.clip(np.nan_to_num(code_contributions), 0.0, None)
    if causes is not None:
        positive = positive * np.asarray(causes, dtype=bool)
    total = positive.sum(axis=1)
    has_cause = total > 0
    mix = np.zeros_like(positive)
    mix[has_cause] = positive[has_cause] / total[has_cause, None]
    return mix, has_cause


def cause_lift(code_contributions: np.ndarray, causes: np.ndarray | None = None) -> np.ndarray:
    """How far each event's cause codes raised its log-odds: the sum of their positive parts."""
    positive = np.clip(np.nan_to_num(code_contributions), 0.0, None)
    if causes is not None:
        positive = positive * np.asarray(causes, dtype=bool)
    return positive.sum(axis=1)


def sample_keys(ids: Sequence[str] | np.ndarray) -> np.ndarray:
    """A fixed hash of each event id, as a number in [0, 1): the order-free key that draws the
    fit sample (the smallest keys win)."""
    hashed = pd.util.hash_array(np.asarray(ids, dtype=object).astype(str).astype(object))
    return (hashed >> np.uint64(11)).astype(np.float64) * 2.0**-53


def distances(mix: np.ndarray, profiles: np.ndarray, chunk: int = 65_536) -> np.ndarray:
    """Total variation distance of every mix to every profile, shape (events, profiles)."""
    out = np.empty((mix.shape[0], profiles.shape[0]))
    for start in range(0, mix.shape[0], chunk):
        part = mix[start:start + chunk]
        out[start:start + chunk] = 0.5 * np.abs(part[:, None, :] - profiles[None, :, :]).sum(-1)
    return out


def assign(
    mix: np.ndarray, has_cause: np.ndarray, profiles: np.ndarray,
    held: np.ndarray | None = None, distance: float = ASSIGN_DISTANCE,
) -> tuple[np.ndarray, np.ndarray]:
    """Each event's group (-1: ungrouped) and membership strength, the share of its mix in
    common with its group's profile (1 - distance; 0 when ungrouped). An event whose nearest
    profile is one of ``held`` (profiles of no clear cause) stays ungrouped."""
    labels = np.full(mix.shape[0], -1, dtype=np.int64)
    strength = np.zeros(mix.shape[0])
    rows = np.flatnonzero(has_cause)
    if rows.size == 0 or profiles.shape[0] == 0:
        return labels, strength
    if held is not None and held.shape[0]:
        profiles = np.vstack([profiles, held])
    causes = profiles.shape[0] - (0 if held is None else held.shape[0])
    found = distances(mix[rows], profiles)
    nearest = found.argmin(axis=1)
    gap = found[np.arange(rows.size), nearest]
    inside = (gap <= distance) & (nearest < causes)
    labels[rows[inside]] = nearest[inside]
    strength[rows[inside]] = 1.0 - gap[inside]
    return labels, strength


def leading_codes(profile: np.ndarray) -> list[int]:
    """Positions of a profile's leading codes: at least :data:`LEADING_SHARE` of its mix,
    strongest first, at most :data:`LEADING_CODES` (the strongest one always)."""
    order = np.argsort(-profile, kind="stable")[:LEADING_CODES]
    return [int(i) for i in order if profile[i] >= LEADING_SHARE] or [int(order[0])]


class GroupFinder:
    """Cause profiles found on the mixes of events with a cause (see the module docstring).

    ``fit`` takes the sample's mixes, keys and lifts (:func:`cause_lift`) and, when the sample
    is part of a larger run, the number of events with a cause in all of it (the smallest group
    follows that number).
    Fitted: ``profiles_`` (groups x codes), ``held_`` (profiles of no clear cause, whose nearest
    events stay ungrouped), ``rounds_`` (refining rounds run), ``splits_`` (fringes parted in
    step 4), ``min_group_size_`` (for all events), ``sample_min_group_``, ``min_samples_``,
    and ``candidate_labels_`` (HDBSCAN's cluster of each fitted row, -1 for noise) with their
    number ``candidates_``.
    """

    def __init__(self, min_group_size: int | None = None, min_samples: int = MIN_SAMPLES) -> None:
        self.min_group_size = min_group_size
        self.min_samples = min_samples

    def fit(
        self, mix: np.ndarray, keys: np.ndarray, events: int | None = None,
        lift: np.ndarray | None = None,
    ) -> GroupFinder:
        n = mix.shape[0]
        lift = np.full(n, np.inf) if lift is None else np.asarray(lift, dtype=np.float64)
        events = n if events is None else events
        self.min_group_size_ = int(self.min_group_size or default_min_group_size(events))
        size = self.min_group_size_ if events <= n else max(
            SAMPLED_MIN_GROUP, round(self.min_group_size_ * n / events))
        self.sample_min_group_ = int(size)
        self.candidates_ = 0
        self.candidate_labels_ = np.full(n, -1, dtype=np.int64)
        self.min_samples_ = int(min(self.min_samples, size))
        self.profiles_ = np.zeros((0, mix.shape[1]))
        self.held_ = np.zeros((0, mix.shape[1]))
        self.rounds_ = self.splits_ = 0
        if n <= size:
            return self  # too few events for even one group: all are ungrouped
        # The hash order, ties by mix: the same events always reach HDBSCAN in the same order.
        order = np.lexsort((*mix.T[::-1], keys))
        mix, lift = mix[order], lift[order]
        self.min_samples_ = int(min(self.min_samples, size))
        clusters = hdbscan.HDBSCAN(
            min_cluster_size=size, min_samples=self.min_samples_, metric="manhattan",
        ).fit(mix).labels_
        self.candidate_labels_ = np.empty(n, dtype=np.int64)
        self.candidate_labels_[order] = clusters
        found = list(range(int(clusters.max(initial=-1)) + 1))
        self.candidates_ = len(found)
        if found:
            profiles = np.array([mix[clusters == c].mean(axis=0) for c in found])
            counts = np.array([int((clusters == c).sum()) for c in found])
        else:
            # No dense region at all (say, very few events): each code that leads enough
            # events offers its events' mean mix instead.
            top = mix.argmax(axis=1)
            codes = [c for c in np.unique(top) if (top == c).sum() >= size]
            profiles = np.array([mix[top == c].mean(axis=0) for c in codes]).reshape(
                len(codes), mix.shape[1])
            counts = np.array([int((top == c).sum()) for c in codes])
        profiles, counts = _merged(profiles, counts)
        profiles, self.rounds_ = _refined(mix, profiles, size)
        profiles, self.splits_ = _bisected(mix, lift, profiles, size)
        kept, clear = _judged(mix, lift, profiles, size)
        self.profiles_ = profiles[kept & clear]
        self.held_ = profiles[kept & ~clear]
        return self

    def assign(self, mix: np.ndarray, has_cause: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Labels and strengths of any events by the fitted profiles (see :func:`assign`)."""
        return assign(mix, has_cause, self.profiles_, self.held_)

    def parameters(self, sampled: int, fit_sample: int) -> dict[str, object]:
        """How the groups were found, for ``summary.json``."""
        return {
            "method": "cause profiles: HDBSCAN candidates, merged, events placed by the "
                      "nearest profile",
            "min_group_size": self.min_group_size_, "min_samples": self.min_samples_,
            "fit_sample": int(fit_sample), "sampled_events": int(sampled),
            "sample_min_group_size": self.sample_min_group_,
            "candidates": self.candidates_, "groups": int(self.profiles_.shape[0]),
            "held_profiles": int(self.held_.shape[0]), "refining_rounds": self.rounds_,
            "fringes_parted": self.splits_,
            "merge_distance": MERGE_DISTANCE, "assign_distance": ASSIGN_DISTANCE,
        }


def bottom(keys: np.ndarray, k: int = FIT_SAMPLE) -> np.ndarray:
    """Positions of the ``k`` smallest keys, in position order: the fit sample."""
    if keys.size <= k:
        return np.arange(keys.size)
    return np.sort(np.argsort(keys, kind="stable")[:k])


def _refined(mix: np.ndarray, profiles: np.ndarray, size: int) -> tuple[np.ndarray, int]:
    """Profiles re-estimated as their members' mean mix until they stop moving (at most
    :data:`REFINE_ROUNDS`), dropping those with fewer than ``size`` members and merging those
    that come together; and the rounds run."""
    everyone = np.ones(mix.shape[0], dtype=bool)
    rounds = 0
    while rounds < REFINE_ROUNDS:
        rounds += 1
        labels, _ = assign(mix, everyone, profiles)
        counts = np.bincount(labels[labels >= 0], minlength=profiles.shape[0])
        keep = np.flatnonzero(counts >= size)
        refined, _ = _merged(_means(mix, labels, profiles.shape[0])[keep], counts[keep])
        settled = refined.shape == profiles.shape and np.allclose(refined, profiles, atol=1e-9)
        profiles = refined
        if settled:
            break
    return profiles, rounds


def _judged(mix: np.ndarray, lift: np.ndarray, profiles: np.ndarray, size: int
            ) -> tuple[np.ndarray, np.ndarray]:
    """Per profile: whether it has at least ``size`` members, and whether it is a clear cause
    (its members' mean lift at least :data:`MIN_LIFT`); not clear: held."""
    labels, _ = assign(mix, np.ones(mix.shape[0], dtype=bool), profiles)
    inside = labels >= 0
    counts = np.bincount(labels[inside], minlength=profiles.shape[0])
    lifted = np.bincount(labels[inside], weights=lift[inside],
                         minlength=profiles.shape[0]) / np.maximum(counts, 1)
    return counts >= size, lifted >= MIN_LIFT


def _bisected(mix: np.ndarray, lift: np.ndarray, profiles: np.ndarray, size: int
              ) -> tuple[np.ndarray, int]:
    """Profiles after trying to split each cause in two (a bisecting step, as in bisecting
    k-means), and the splits kept. A split is kept only when refining keeps the two parts
    apart and it adds a held profile, not a cause: it parts a cause from a fringe of events of
    no clear cause that the starting candidates had joined to it. A cause is never split into
    two causes (that is what merging undoes)."""
    splits, k = 0, 0
    everyone = np.ones(mix.shape[0], dtype=bool)
    kept, clear = _judged(mix, lift, profiles, size)
    labels, _ = assign(mix, everyone, profiles)
    while k < profiles.shape[0] and splits < MAX_SPLITS:
        members = mix[labels == k]
        if clear[k] and members.shape[0] >= 2 * size:
            halves, counts = _halves(members)
            if counts.min() >= size:
                trial = np.vstack([np.delete(profiles, k, axis=0), halves])
                refined, _ = _refined(mix, trial, size)
                now_kept, now_clear = _judged(mix, lift, refined, size)
                if (now_kept & ~now_clear).sum() > (kept & ~clear).sum() and \
                        (now_kept & now_clear).sum() <= (kept & clear).sum():
                    profiles, kept, clear = refined, now_kept, now_clear
                    labels, _ = assign(mix, everyone, profiles)
                    splits, k = splits + 1, 0
                    continue
        k += 1
    return profiles, splits


def _halves(members: np.ndarray, rounds: int = 30) -> tuple[np.ndarray, np.ndarray]:
    """Two-means of ``members`` by total variation distance, seeded by the member farthest
    from their mean and the member farthest from that one: the two means and their counts."""
    first = members[distances(members, members.mean(axis=0)[None])[:, 0].argmax()]
    second = members[distances(members, first[None])[:, 0].argmax()]
    centres = np.vstack([first, second])
    for _ in range(rounds):
        side = distances(members, centres).argmin(axis=1)
        if side.min() == side.max():
            break
        moved = _means(members, side, 2)
        if np.allclose(moved, centres, atol=1e-9):
            break
        centres = moved
    counts = np.bincount(side, minlength=2)
    return centres, counts


def _means(mix: np.ndarray, labels: np.ndarray, groups: int) -> np.ndarray:
    """Mean mix of each label's rows (0 .. groups-1; -1 left out), shape (groups, codes)."""
    inside = labels >= 0
    counts = np.maximum(np.bincount(labels[inside], minlength=groups), 1)
    sums = np.stack([np.bincount(labels[inside], weights=column[inside], minlength=groups)
                     for column in mix.T], axis=1)
    return sums.reshape(groups, mix.shape[1]) / counts[:, None]


def _merged(profiles: np.ndarray, counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Profiles merged, closest pair first, while two are within :data:`MERGE_DISTANCE` or
    share their two leading codes; a merged profile is the members' mean mix."""
    profiles = [p for p in profiles]
    counts = [int(c) for c in counts]
    while len(profiles) > 1:
        stacked = np.array(profiles)
        gap = distances(stacked, stacked)
        np.fill_diagonal(gap, np.inf)
        label = [tuple(leading_codes(p)[:2]) for p in profiles]
        pairs = [(float(gap[i, j]), i, j) for i in range(len(profiles))
                 for j in range(i + 1, len(profiles))
                 if gap[i, j] <= MERGE_DISTANCE or label[i] == label[j]]
        if not pairs:
            break
        _, i, j = min(pairs)
        total = counts[i] + counts[j]
        profiles[i] = (profiles[i] * counts[i] + profiles[j] * counts[j]) / max(total, 1)
        counts[i] = total
        del profiles[j], counts[j]
    width = profiles[0].shape[0] if profiles else 0
    return np.array(profiles).reshape(len(profiles), width), np.array(counts, dtype=np.int64)


@dataclass(frozen=True)
class Group:
    """One group as found in this run, before it gets its tracked id; ``label`` is its index."""

    label: int
    size: int
    signature: dict[str, float]
    leading: list[str]


def find_groups(mix_sums: np.ndarray, counts: np.ndarray, codes: Sequence[str]) -> list[Group]:
    """Per group (rows of the summed mixes): mean mix (signature) and leading codes."""
    out = []
    for cluster, size in enumerate(counts.tolist()):
        if size == 0:
            continue
        mean = mix_sums[cluster] / size
        leading = [codes[i] for i in leading_codes(mean)]
        signature = {codes[i]: float(mean[i]) for i in np.flatnonzero(mean > 0)}
        out.append(Group(label=cluster, size=int(size), signature=signature, leading=leading))
    return out


def label_for(leading: Sequence[str]) -> str:
    """A readable name from the leading codes, e.g. 'condenser fouled + store warm'."""
    return " + ".join(
        " ".join(code.removeprefix("F_").lower().replace("_", " ").split()) for code in leading[:2]
    )
