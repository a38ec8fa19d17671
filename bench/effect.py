"""The fix-effect study (``causeline effect``): its time on a year of the demo fleet's logs
(target: under a minute), and how often its intervals cover the planted truth on fresh seeds.

Planted truth comes from fixtures/demo/planted.py (the default plan: coil cleaning cuts the
hazard by 40 %, a firmware update does nothing, a leak repair follows failures). Per size and
seed it prints nothing; per size, the coverage of each measured kind out of the seeds, how
often the no-effect kind's interval holds zero, how often the repair got its warning, and the
worst seed (largest miss, in interval half-widths); coverage and mean half-width both for the
default bootstrap over cases and for one over whole stores (``cluster_by="store_id"``).

    python bench/effect.py                 # timing and 20 seeds of three fleet sizes
    python bench/effect.py --seeds 5 --no-timing --no-conveyors

The second domain, conveyor drives (fixtures/conveyors/generate.py, ``plant=``), has a jam
guard that halves the jam hazard and a recalibration that does nothing: 20 seeds of 120
drives over 240 days.
"""

from __future__ import annotations

import argparse
import tempfile
import time
from pathlib import Path

from common import ROOT, report

MEASURED = ("coil_cleaning", "firmware_update")


def _spec():  # type: ignore[no-untyped-def]
    from causeline.service.spec.dataset import DatasetSpec
    from fixtures.demo.planted import DEFAULT_PLAN, planted_config

    raw = planted_config(DEFAULT_PLAN)
    raw.pop("training", None)
    raw.pop("explain", None)
    return DatasetSpec.model_validate(raw)


def timing(folder: Path) -> None:
    import yaml

    from causeline.service.bundle.load import load_bundle
    from causeline.service.effect.job import run_effect
    from causeline.service.features.logs import RawPaths
    from causeline.training.pipeline import train_timeline
    from fixtures.demo.planted import DEFAULT_PLAN, planted_config
    from fixtures.demo.timeline import planted_timeline, write_timeline

    timeline, _ = planted_timeline(cases=320, days=365, seed=7)
    write_timeline(timeline, folder)
    paths = RawPaths(folder / "readings.parquet", folder / "excursions.parquet",
                     folder / "maintenance.parquet", folder / "cases.parquet")
    report("effect_readings", f"{len(timeline.readings):,}")
    started = time.perf_counter()
    run_effect(_spec(), paths, folder / "out")
    report("effect_year_s", time.perf_counter() - started)
    config = folder / "config.yaml"
    config.write_text(yaml.safe_dump(planted_config(DEFAULT_PLAN)))
    train_timeline(config, paths, folder / "bundle")
    bundle = load_bundle(folder / "bundle")
    started = time.perf_counter()
    run_effect(_spec(), paths, folder / "out-model", bundle=bundle)
    report("effect_year_with_model_s", time.perf_counter() - started)


def coverage(cases: int, days: int, seeds: range) -> None:
    """Per fleet size: how often the intervals cover the planted truth with the planted
    config (cases compared within their store, resampled alone), resampling whole stores
    instead (``--cluster-by store_id``), and comparing across the fleet (no
    ``compare_within``)."""
    import numpy as np

    from causeline.service.effect.design import FLEET
    from causeline.service.effect.job import EffectOptions, study
    from causeline.service.features.logs import TimelineInputs
    from fixtures.demo.timeline import planted_timeline

    units = {"entity": EffectOptions(), "store": EffectOptions(cluster_by="store_id"),
             "entity_across_fleet": EffectOptions(compare_within=FLEET)}
    after = units["entity"].after
    spec = _spec()
    covered = {(unit, kind): 0 for unit in units for kind in MEASURED}
    width = {(unit, kind): [] for unit in units for kind in MEASURED}
    zero, warned, worst = 0, 0, (0.0, None, None)
    # Rows whose note doubts parallel trends (drift before, or groups that start apart), and
    # the misses among them.
    noted = {kind: 0 for kind in MEASURED}
    missed = {kind: [0, 0] for kind in MEASURED}
    errors: dict[str, list[float]] = {k: [] for k in MEASURED}
    for seed in seeds:
        timeline, planted = planted_timeline(cases=cases, days=days, seed=seed)
        inputs = TimelineInputs(timeline.readings, timeline.excursions, timeline.maintenance,
                                timeline.cases)
        for unit, options in units.items():
            table = study(spec, inputs, options).table.set_index("action_kind")
            for kind in MEASURED:
                row = table.loc[kind]
                truth = planted.truth(kind, after)
                low, high, effect = row["effect_low"], row["effect_high"], row["effect_per_1000"]
                covered[unit, kind] += int(low <= truth <= high)
                width[unit, kind].append((high - low) / 2)
                if unit != "entity":
                    continue
                if np.isfinite(effect):  # a warning gave no number: counted as a miss
                    errors[kind].append(effect - truth)
                doubted = any(cue in str(row["note"]) for cue in ("drifting", "start apart"))
                noted[kind] += int(doubted)
                if not low <= truth <= high:
                    missed[kind][0] += 1
                    missed[kind][1] += int(doubted)
                miss = abs(effect - truth) / ((high - low) / 2)
                if miss > worst[0]:
                    worst = (miss, seed, kind)
            if unit == "entity":
                zero += int(table.loc["firmware_update", "effect_low"] <= 0
                            <= table.loc["firmware_update", "effect_high"])
                warned += int(table.loc["leak_repair", "warning"].startswith("follows failures")
                              and np.isnan(table.loc["leak_repair", "effect_per_1000"]))
    n = len(seeds)
    tag = f"{cases}x{days}"
    for kind in MEASURED:
        for unit in units:
            report(f"effect_coverage_{kind}_{tag}_by_{unit}", f"{covered[unit, kind]}/{n}")
            report(f"effect_half_width_{kind}_{tag}_by_{unit}",
                   float(np.nanmean(width[unit, kind])))
        report(f"effect_trend_noted_{kind}_{tag}", f"{noted[kind]}/{n}")
        report(f"effect_misses_noted_{kind}_{tag}", f"{missed[kind][1]}/{missed[kind][0]}")
        report(f"effect_bias_{kind}_{tag}", float(np.mean(errors[kind])))
        report(f"effect_rmse_{kind}_{tag}", float(np.sqrt(np.mean(np.square(errors[kind])))))
    report(f"effect_no_effect_interval_holds_zero_{tag}", f"{zero}/{n}")
    report(f"effect_repair_after_failures_warned_{tag}", f"{warned}/{n}")
    report(f"effect_worst_seed_{tag}",
           f"seed {worst[1]} {worst[2]}: miss {worst[0]:.2f} interval half-widths")


def conveyor_coverage(drives: int, days: int, seeds: range) -> None:
    """The second domain (fixtures/conveyors/generate.py): a jam guard that halves jams and a
    recalibration that does nothing, on fresh seeds; coverage, bias and RMSE per kind."""
    import numpy as np

    from causeline.service.effect.job import EffectOptions, study
    from causeline.service.features.logs import TimelineInputs
    from causeline.service.spec.dataset import DatasetSpec
    from fixtures.conveyors.generate import PLANTED_FIXES, generate, planted_config

    spec = DatasetSpec.model_validate(planted_config())
    options = EffectOptions()
    found: dict[str, list[tuple[float, float, float, float]]] = {k: [] for k, _ in PLANTED_FIXES}
    for seed in seeds:
        timeline = generate(drives, days, seed, plant=PLANTED_FIXES)
        assert timeline.planted is not None
        inputs = TimelineInputs(timeline.readings, timeline.failures, timeline.maintenance,
                                timeline.drives)
        table = study(spec, inputs, options).table.set_index("action_kind")
        for kind in found:
            row = table.loc[kind]
            found[kind].append((timeline.planted.truth(kind, options.after),
                                row["effect_per_1000"], row["effect_low"], row["effect_high"]))
    tag = f"{drives}x{days}"
    for kind, rows in found.items():
        truth, effect, low, high = (np.array(column) for column in zip(*rows, strict=True))
        report(f"effect_conveyor_coverage_{kind}_{tag}",
               f"{int(((low <= truth) & (truth <= high)).sum())}/{len(rows)}")
        report(f"effect_conveyor_truth_{kind}_{tag}", f"{truth.min():.1f} to {truth.max():.1f}")
        report(f"effect_conveyor_bias_{kind}_{tag}", float(np.mean(effect - truth)))
        report(f"effect_conveyor_rmse_{kind}_{tag}",
               float(np.sqrt(np.mean(np.square(effect - truth)))))
        report(f"effect_conveyor_half_width_{kind}_{tag}", float(np.mean((high - low) / 2)))


# Fleet sizes and their first seeds: fresh ones, never used in the tests (21-26) or while
# building and checking the study (100-119, 5000-5019, 6000-6019, 7000-9059, 11000-17019,
# 22000-27019, 30000-30099, 31000-31059, 32000-32059).
SIZES = ((320, 365, 18000), (160, 300, 19000), (100, 365, 20000))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=20)
    parser.add_argument("--no-timing", action="store_true")
    parser.add_argument("--no-conveyors", action="store_true",
                        help="skip the second domain (about 10 s a seed)")
    parser.add_argument("--first-seeds", type=lambda text: [int(x) for x in text.split(",")],
                        help="the first seed of each size, comma-separated (default: "
                        + ",".join(str(size[2]) for size in SIZES) + ")")
    args = parser.parse_args()
    if not args.no_timing:
        with tempfile.TemporaryDirectory(prefix="causeline-effect-") as folder:
            timing(Path(folder))
    firsts = args.first_seeds or [size[2] for size in SIZES]
    for (cases, days, _), first in zip(SIZES, firsts, strict=True):
        coverage(cases, days, range(first, first + args.seeds))
    if not args.no_conveyors:
        conveyor_coverage(120, 240, range(21000, 21000 + args.seeds))


if __name__ == "__main__":
    assert ROOT.exists()
    main()
