"""Root-cause groups against planted truth: every scenario, several fresh seeds and sizes.

For each scenario of ``fixtures/scenarios.py`` a bundle is trained on one seed, then the events
of fresh seeds are grouped by the real local job at each size. Printed per scenario: the
adjusted Rand index between groups and planted causes (scored events that were grouped; min and
median over seeds and sizes, and per size), the largest share of scored events left ungrouped,
whether every cause's largest group suggested its fix, and the events avoidable against the
generator's own re-run of each fix (the ratio of their sums). The public AI4I file is grouped
once with the bundle trained on it.

    python bench/grouping.py                           # make bench: 3 seeds x 3 sizes
    python bench/grouping.py --seeds 5 --sizes 0.1 1 14  # up to about 50,000 events
    python bench/grouping.py --first-seed 301            # other fresh seeds than 101-103
"""

from __future__ import annotations

import argparse
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import pandas as pd
from sklearn.metrics import adjusted_rand_score

from bench.common import AI4I, ai4i_bundle, report

TRAIN_SEEDS = {"demo": 7, "timeline": 7, "ai4i": 3, "jobs": 5}
# Sizes relative to each scenario's default; AI4I's default holds fewer events, so it runs at
# twice these to cover about the same range (300 to 15,000 events in make bench).
SCALE = {"demo": 1.0, "timeline": 1.0, "ai4i": 2.0, "jobs": 1.0}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=3, help="fresh seeds per size")
    parser.add_argument("--sizes", type=float, nargs="+", default=[0.1, 1.0, 4.0])
    parser.add_argument("--first-seed", type=int, default=101, help="first of the fresh seeds")
    parser.add_argument("--scenarios", nargs="+", default=list(TRAIN_SEEDS))
    args = parser.parse_args(argv)
    from fixtures.scenarios import grouped, trained

    with tempfile.TemporaryDirectory(prefix="causeline-bench-grouping-") as scratch:
        folder = Path(scratch)
        for name in args.scenarios:
            bundle = trained(name, TRAIN_SEEDS[name], folder)
            aris: list[float] = []
            ungrouped: list[float] = []
            fixes_right = True
            estimate = truth = 0.0
            started = time.perf_counter()
            for size in args.sizes:
                per_size: list[float] = []
                events = 0
                for seed in range(args.first_seed, args.first_seed + args.seeds):
                    scores = grouped(name, bundle, seed, size * SCALE[name], folder)
                    per_size.append(scores.ari)
                    ungrouped.append(scores.ungrouped)
                    events = max(events, scores.scored)
                    fixes_right &= all(scores.fix_right.values())
                    estimate += sum(e for _, e, _ in scores.avoidable)
                    truth += sum(t for _, _, t in scores.avoidable)
                aris += per_size
                report(f"grouping_ari_{name}_size{size:g}_min", min(per_size))
                report(f"grouping_scored_events_{name}_size{size:g}", events)
            report(f"grouping_ari_{name}_min", min(aris))
            report(f"grouping_ari_{name}_median", statistics.median(aris))
            report(f"grouping_ungrouped_{name}_max", max(ungrouped))
            report(f"grouping_fix_right_{name}", "yes" if fixes_right else "no")
            if truth > 0:
                report(f"grouping_avoidable_over_truth_{name}", estimate / truth)
            report(f"grouping_seconds_{name}", time.perf_counter() - started)
        _public_ai4i(folder)
    return 0


def _public_ai4i(folder: Path) -> None:
    """The public AI4I 2020 file grouped with a bundle trained on it: ARI against the
    published failure modes (single-mode failures, no random failure)."""
    from causeline.service.bundle.load import load_bundle
    from causeline.service.rootcause.local import run_rootcause

    data = AI4I / "ai4i2020.csv"
    result = run_rootcause(load_bundle(ai4i_bundle(folder / "ai4i-public")), data,
                           folder / "ai4i-public-rc")
    table = pd.read_csv(data)
    flags = table[["TWF", "HDF", "PWF", "OSF"]]
    single = (table["Machine failure"] == 1) & (flags.sum(axis=1) == 1) & (table["RNF"] == 0)
    mode = flags[single].idxmax(axis=1)
    mode.index = table.loc[mode.index, "UDI"].astype(str)
    group = result.event_groups.set_index("event_id").loc[mode.index, "group_id"]
    inside = (group != "G-UNGROUPED").to_numpy()
    report("grouping_ari_ai4i_public", float(adjusted_rand_score(mode[inside], group[inside])))
    report("grouping_ungrouped_ai4i_public", float(1 - inside.mean()))


if __name__ == "__main__":
    raise SystemExit(main())
