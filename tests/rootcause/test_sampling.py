"""Placing events by cause profiles when some profiles are held (of no clear cause)."""

from __future__ import annotations

import numpy as np

from causeline.service.rootcause.grouping import _bisected, _joined, _judged, _refined, assign


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


def _cause_spread_and_fringe(spread: int, share: float) -> tuple[np.ndarray, np.ndarray]:
    """300 events of a cause [1, 0, 0] and ``spread`` more of it reaching into a third code,
    [1 - share, 0, share] (lift 2 all), and 120 of a fringe [0.55, 0.45, 0] (lift 0.1)."""
    mix = np.vstack([np.tile([1.0, 0.0, 0.0], (300, 1)),
                     np.tile([1 - share, 0.0, share], (spread, 1)),
                     np.tile([0.55, 0.45, 0.0], (120, 1))])
    lift = np.concatenate([np.full(300 + spread, 2.0), np.full(120, 0.1)])
    return mix, lift


def _fit_from(mix: np.ndarray, lift: np.ndarray, start: np.ndarray) -> np.ndarray:
    profiles = _bisected(mix, lift, _refined(mix, start, 50)[0], 50)[0]
    return _joined(mix, lift, profiles, 50)[0]


def test_a_fringe_is_joined_where_two_means_would_not_part_it() -> None:
    # The mirror of the test above. The cause spreads towards a third code, and the events
    # farthest from its mean are there, so two-means (seeded by the farthest events) cuts that
    # spread off: a second cause, not a held profile, so the bisecting step leaves one profile
    # holding every event, their mean [(300 + 45 + 66) / 520, 54 / 520, 55 / 520] =
    # [0.790, 0.104, 0.106]. Started instead from the cause and the fringe apart (as a sample's
    # candidates may offer them), the two stay apart after refining and bisecting; joining the
    # held fringe gives the same single profile as the other start.
    mix, lift = _cause_spread_and_fringe(100, 0.55)
    joined_start = mix.mean(axis=0, keepdims=True)
    apart_start = np.vstack([mix[:400].mean(axis=0), mix[400:].mean(axis=0)])
    apart = _bisected(mix, lift, _refined(mix, apart_start, 50)[0], 50)[0]
    assert apart.shape[0] == 2
    expected = [[411 / 520, 54 / 520, 55 / 520]]
    np.testing.assert_allclose(_joined(mix, lift, apart, 50)[0], expected, atol=1e-12)
    np.testing.assert_allclose(_fit_from(mix, lift, joined_start), expected, atol=1e-12)


def test_a_fringe_two_means_would_part_stays_apart() -> None:
    # With the spread nearer the cause (150 events at [0.6, 0, 0.4]), the fringe is what lies
    # farthest: two-means parts it as a held profile from either start, so joining it back is
    # undone and both starts end with the cause and the fringe apart.
    mix, lift = _cause_spread_and_fringe(150, 0.4)
    apart_start = np.vstack([mix[:450].mean(axis=0), mix[450:].mean(axis=0)])
    for start in (mix.mean(axis=0, keepdims=True), apart_start):
        profiles = _fit_from(mix, lift, start)
        assert sorted(map(tuple, np.round(profiles, 3))) == [(0.55, 0.45, 0.0),
                                                             (0.867, 0.0, 0.133)]
