"""Placing events by cause profiles when some profiles are held (of no clear cause)."""

from __future__ import annotations

import numpy as np

from causeline.service.rootcause.grouping import assign


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
