"""What to change: time per flagged event of the exact search on the demo model (its trees,
its controllable features with the demo config's change settings, at most 2 changes), beside
the plain explain rate measured in the same run; then the same on a heavier variant: 300 trees
(early stopping off) and a fourth changeable feature (the setpoint, in 0.5 degree steps)."""

from __future__ import annotations

import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench.common import ROOT, demo_bundle, rate, report

EVENTS = 1_000


def main() -> None:
    path = demo_bundle()
    measure(path, "actions")
    measure(heavy_bundle(path.parent), "actions.heavy")


def heavy_bundle(folder: Path) -> Path:
    """The demo fleet trained to 300 trees (a slow learning rate, so the best round is the
    last) with the setpoint changeable too."""
    import yaml

    from causeline.training.pipeline import train

    config = yaml.safe_load((ROOT / "fixtures" / "demo" / "config.yaml").read_text("utf-8"))
    for feature in config["features"]:
        if feature["name"] == "setpoint_c":
            feature["change"] = {"min": -22, "max": 3, "step": 0.5, "cost": 10}
    config["training"].update(max_rounds=300, early_stopping_rounds=300,
                              lightgbm={"learning_rate": 0.01})
    (folder / "heavy.yaml").write_text(yaml.safe_dump(config, sort_keys=False), "utf-8")
    train(folder / "heavy.yaml", folder / "cases.parquet", folder / "heavy")
    return folder / "heavy"


def measure(path: Path, name: str) -> None:
    import pandas as pd

    from causeline.service.actions.search import ActionFinder
    from causeline.service.bundle.load import load_bundle
    from causeline.service.explain.explainer import Explainer

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
    report(f"{name}.trees", float(bundle.booster.num_trees()))
    report(f"{name}.changeable_features", float(movable))
    report(f"{name}.events", float(len(flagged)))
    report(f"{name}.median_ms_per_event", 1000 * statistics.median(times))
    report(f"{name}.p99_ms_per_event", 1000 * sorted(times)[int(0.99 * (len(times) - 1))])
    report(f"{name}.total_s", total)
    report(f"{name}.explain_one_event_ms", 1000 / one)


if __name__ == "__main__":
    main()
