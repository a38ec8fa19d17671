"""The window behind the recent-events gauges on /metrics (through the app: test_api.py)."""

from __future__ import annotations

import collections

import numpy as np
import pytest

from causeline.service.api.metrics import Recent


def test_the_window_keeps_whole_batches_of_the_latest_events() -> None:
    rng = np.random.default_rng(0)
    recent = Recent(100)
    batches = []
    for _ in range(200):
        size = int(rng.integers(1, 9))
        codes = collections.Counter(rng.choice(["A", "B", "C"], size).tolist())
        probability = float(rng.uniform(0, size))
        recent.add(size, probability, codes)
        batches.append((size, probability, codes))
        # Brute force: the latest batches, newest first, until dropping one more would leave
        # fewer than 100 events.
        kept, count = [], 0
        for batch in reversed(batches):
            kept.append(batch)
            count += batch[0]
            if count - batch[0] >= 100:
                kept.pop()
                count -= batch[0]
                break
        assert recent.events == count
        assert recent.probability == pytest.approx(sum(b[1] for b in kept))
        total = sum((b[2] for b in kept), collections.Counter())
        assert {k: v for k, v in recent.codes.items() if v} == dict(total)
    assert 100 <= recent.events < 108
