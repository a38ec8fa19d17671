"""Placing events by cause profiles when some profiles are held (of no clear cause)."""

from __future__ import annotations

import numpy as np

from causeline.service.rootcause.grouping import _bisected, _judged, _refined, assign


def test_events_nearest_a_held_profile_stay_ungrouped() -> None:
    # Total variation distance (half the L1 distance) worked by hand: [0.4, 0.3, 0.3] is 0.6
    # from the cause [1, 0, 0] and 0.4 from the held [0, 0.5, 0.5]. A held profile keeps its
    # nearest events out of every group, even those within reach of a cause (0.7); without it
    # they join that cause.
    cause = np.array([[1.0, 0.0, 0.0]])
    held = np.array([[0.0, 0.5, 0.5]])
    mix = np.array([[0.9, 0.1, 0.0], [0.4, 0.3, 0.3], [0.0, 0.5, 0.5]])
    everyone = np.ones(3, dtype=bool)
    labels, strength = assign(mix, everyone, cause, held)
    assert labels.tolist() == [0, -1, -1]
    assert strength.tolist() == [0.9, 0.0, 0.0]
    assert assign(mix, everyone, cause)[0].tolist() == [0, 0, -1]


def _cause_and_fringe(fringe_lift: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """300 events of a pure cause [1, 0, 0] (lift 2) and 150 of the mix [0.45, 0.55, 0] with
    ``fringe_lift``, and the one profile a sample's candidates could have joined them in."""
    mix = np.vstack([np.tile([1.0, 0.0, 0.0], (300, 1)), np.tile([0.45, 0.55, 0.0], (150, 1))])
    lift = np.concatenate([np.full(300, 2.0), np.full(150, fringe_lift)])
    return mix, lift, mix.mean(axis=0, keepdims=True)


def test_a_cause_is_parted_from_a_fringe_of_no_clear_cause() -> None:
    # Worked by hand: the joined profile is [0.817, 0.183, 0], 0.183 and 0.367 from the two
    # mixes, so refining alone keeps every event in it (mean lift 1.37, a cause). Split in two,
    # the parts are 0.55 apart with different leading codes, so merging keeps them apart, and
    # the fringe's lift (0.1, below ln 1.5) makes it a held profile: the split is kept.
    mix, lift, joined = _cause_and_fringe(0.1)
    assert _refined(mix, joined, 50)[0].shape[0] == 1
    profiles, splits = _bisected(mix, lift, joined, 50)
    assert splits == 1
    assert sorted(map(tuple, np.round(profiles, 9))) == [(0.45, 0.55, 0.0), (1.0, 0.0, 0.0)]
    kept, clear = _judged(mix, lift, profiles, 50)
    assert kept.all() and sorted(clear.tolist()) == [False, True]


def test_a_cause_is_never_split_into_two_causes() -> None:
    # The same events, the second mix now raising its odds as much as the first (lift 2): a
    # split would add a cause, not a held profile, so the joined profile stays as it was.
    mix, lift, joined = _cause_and_fringe(2.0)
    profiles, splits = _bisected(mix, lift, joined, 50)
    assert splits == 0
    np.testing.assert_array_equal(profiles, joined)
