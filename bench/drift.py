"""The drift check: speed on 10^6 events, and (``--study``) false alarms and detection.

``python bench/drift.py`` times ``causeline drift`` on 10^6 demo events (a Parquet table, read
in chunks; reason codes from the default sample of 200,000 events) in a process of its own and
prints its wall time and peak memory (target: under a minute).

``python bench/drift.py --study --seeds 20 [--domain demo|ai4i]`` trains one bundle per domain
(the demo fleet, the AI4I simulation), then checks fresh draws of the same process (false
alarms: any verdict but ``ok``) and draws with each planted shift (detected: a verdict other
than ``ok`` with a touched feature flagged; wrongly flagged: a feature or code the shift did
not touch), and prints the rates with the worst seed.
"""

from __future__ import annotations

import argparse
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from bench.common import demo_bundle, report  # noqa: E402

EVENTS = 1_000_000


def speed(folder: Path) -> None:
    import numpy as np
    import pandas as pd

    from fixtures.demo.generate import generate

    bundle = demo_bundle(folder / "speed")
    frames, total, seed = [], 0, 100
    while total < EVENTS:
        frame = generate(seed=seed)
        frames.append(frame)
        total, seed = total + len(frame), seed + 1
    table = pd.concat(frames, ignore_index=True).iloc[:EVENTS]
    table["snapshot_id"] = np.arange(EVENTS).astype(str)
    data = folder / "events.parquet"
    table.to_parquet(data, index=False, row_group_size=100_000)
    del table, frames
    command = [sys.executable, "-m", "causeline.cli", "drift", "--bundle", str(bundle),
               "--input", str(data), "--out", str(folder / "out"), "--label", "went_warm_24h",
               "--quiet"]
    started = time.perf_counter()
    done = subprocess.run(command, capture_output=True, text=True)
    seconds = time.perf_counter() - started
    if done.returncode not in (0, 10, 11):
        print(done.stderr, file=sys.stderr)
        raise SystemExit(1)
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    report("drift_events", EVENTS)
    report("drift_seconds", seconds)
    report("drift_events_per_second", EVENTS / seconds)
    report("drift_peak_mb", peak)
    report("drift_target_seconds", 60.0)
    report("drift_within_target", "yes" if seconds < 60 else "no")


def _domains():  # type: ignore[no-untyped-def]
    from fixtures.ai4i2020 import simulate as ai4i
    from fixtures.demo import generate as demo

    return {
        "demo": (ROOT / "fixtures/demo/config.yaml", "went_warm_24h",
                 lambda seed, shift=None: demo.generate(seed=seed, shift=shift), demo.SHIFTS, 7),
        "ai4i": (ROOT / "fixtures/ai4i2020/config.yaml", "Machine failure",
                 lambda seed, shift=None: ai4i.simulate(50_000, seed, shift), ai4i.SHIFTS, 3),
    }


def study(folder: Path, seeds: int, only: str | None = None) -> None:
    from causeline.service.bundle.load import load_bundle
    from causeline.service.drift.job import DriftOptions, run_drift
    from causeline.training.pipeline import train

    for domain, (config, label, draw, shifts, seed0) in _domains().items():
        if only is not None and domain != only:
            continue
        data = folder / f"{domain}.parquet"
        draw(seed0).to_parquet(data, index=False)
        bundle = load_bundle(train(config, data, folder / f"{domain}-bundle").path)
        options = DriftOptions(label=label, replicates=50)

        def check(frame, bundle=bundle, options=options):  # type: ignore[no-untyped-def]
            path = folder / "window.parquet"
            frame.to_parquet(path, index=False)
            result = run_drift(bundle, path, None, options)
            return (result.verdict.level, _flagged(result.tables["features"], "feature"),
                    _flagged(result.tables["codes"], "code"), result.verdict.decided_by)

        alarms, worst = 0, ""
        for seed in range(1000, 1000 + seeds):
            level, features, codes, decided = check(draw(seed))
            if level != "ok":
                alarms += 1
                checks = ", ".join(f"{d['subject']} {d['check']}" for d in decided[:4])
                worst = f"seed {seed}: {level} ({checks})"
        report(f"drift_{domain}_false_alarms",
               f"{alarms}/{seeds}" + (f"  last {worst}" if worst else ""))
        for shift, touched in shifts.items():
            detected, wrong, worst_share = 0, 0, 1.0
            missed: list[str] = []
            for seed in range(1000, 1000 + seeds):
                level, features, codes, _ = check(draw(seed, shift))
                hit = features & set(touched["features"])
                share = len(hit) / len(touched["features"])
                worst_share = min(worst_share, share)
                if level != "ok" and hit:
                    detected += 1
                else:
                    missed.append(str(seed))
                extra = (features - set(touched["features"])) | (codes - set(touched["codes"]))
                if extra:
                    wrong += 1
                    missed.append(f"{seed} also flagged {', '.join(sorted(extra))}")
            report(f"drift_{domain}_{shift}_detected", f"{detected}/{seeds}")
            report(f"drift_{domain}_{shift}_touched_features_flagged_worst_seed", worst_share)
            report(f"drift_{domain}_{shift}_runs_flagging_untouched", f"{wrong}/{seeds}"
                   + (f"  ({'; '.join(missed[:3])})" if missed else ""))


def _flagged(table, column: str) -> set[str]:  # type: ignore[no-untyped-def]
    """Subjects a deciding check flagged."""
    rows = table[(table["level"] != "ok") & table["decides"].astype(bool)]
    return set(rows[column])


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--study", action="store_true", help="false alarms and detection")
    parser.add_argument("--seeds", type=int, default=20)
    parser.add_argument("--domain", choices=("demo", "ai4i"), help="one domain only")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="causeline-drift-") as scratch:
        if args.study:
            study(Path(scratch), args.seeds, args.domain)
        else:
            speed(Path(scratch))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
