"""What to change: time per flagged event of the exact search on the demo model (its trees,
its controllable features with the demo config's change settings, at most 2 changes), beside
the plain explain rate measured in the same run."""

from __future__ import annotations

import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench.common import demo_bundle, rate, report

EVENTS = 1_000


def main() -> None:
    import pandas as pd

    from causeline.service.actions.search import ActionFinder
    from causeline.service.bundle.load import load_bundle
    from causeline.service.explain.explainer import Explainer

    path = demo_bundle()
    bundle = load_bundle(path)
    table = pd.read_parquet(path.parent / "cases.parquet")
    explainer = Explainer(bundle)
    explained = explainer.explain(table.iloc[:60_000])
    flagged = explained.features.values[explained.decision][:EVENTS]
    finder = ActionFinder(bundle, max_changes=2)
    movable = sum(1 for f in bundle.spec.features if f.change is not None)
    times = []
    started = time.perf_counter()
    for row in flagged:
        begun = time.perf_counter()
        finder.find(row)
        times.append(time.perf_counter() - begun)
    total = time.perf_counter() - started
    one = rate(lambda: explainer.explain(table.iloc[:1]), 1, repeat=50)
    report("actions.trees", float(bundle.booster.num_trees()))
    report("actions.changeable_features", float(movable))
    report("actions.events", float(len(flagged)))
    report("actions.median_ms_per_event", 1000 * statistics.median(times))
    report("actions.p99_ms_per_event", 1000 * sorted(times)[int(0.99 * (len(times) - 1))])
    report("actions.total_s", total)
    report("actions.explain_one_event_ms", 1000 / one)


if __name__ == "__main__":
    main()
