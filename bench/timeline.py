"""Building snapshots from raw timelines: readings per second on the demo fleet (>= 10^6), and
the peak memory of ``causeline build`` and of scoring the fleet now (``explain --latest``) on
the conveyor logs (fixtures/conveyors), each against the peak of a process that only reads
the same logs, measured in the same run."""

from __future__ import annotations

import subprocess
import sys
import tempfile
import time
from pathlib import Path

from common import ROOT, rate, report

CONVEYORS = ROOT / "fixtures" / "conveyors"
LOGS = {"--readings": "readings", "--failures": "failures", "--actions": "maintenance",
        "--attributes": "drives"}
READ_ONLY = ("import sys, pandas as pd\n"
             "frames = [pd.read_parquet(p) for p in sys.argv[1:]]\n")


# A small launcher reads its child's peak: a child forked straight from this process would
# count this process's own memory, shared at the fork, in its peak.
LAUNCHER = ("import resource, subprocess, sys\n"
            "done = subprocess.run(sys.argv[1:], stdout=subprocess.DEVNULL)\n"
            "print(resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss)\n"
            "sys.exit(done.returncode)\n")


def peak(command: list[str]) -> tuple[float, float]:
    """Run ``command``; its peak resident memory (MB, from the kernel's rusage) and seconds."""
    started = time.perf_counter()
    done = subprocess.run([sys.executable, "-c", LAUNCHER, *command], capture_output=True,
                          text=True)
    seconds = time.perf_counter() - started
    if done.returncode != 0:
        raise RuntimeError(f"{command[:3]} failed: {done.stderr[-400:]}")
    return int(done.stdout.split()[-1]) / 1024, seconds


def in_process(timeline: object) -> None:
    """Building every snapshot of the logs against building one per entity now, same inputs."""
    from causeline.service.features.logs import TimelineInputs
    from causeline.service.features.snapshots import build_snapshots, current_features
    from causeline.training.config import load_config

    config = load_config(CONVEYORS / "config.yaml")
    assert config.timeline is not None
    inputs = TimelineInputs(timeline.readings, timeline.failures,  # type: ignore[attr-defined]
                            timeline.maintenance, timeline.drives)  # type: ignore[attr-defined]
    every = 1 / rate(lambda: build_snapshots(config.timeline, inputs), 1, repeat=2)
    now = 1 / rate(lambda: current_features(config, inputs), 1, repeat=2)
    report("timeline_all_snapshots_s", every)
    report("timeline_now_snapshots_s", now)
    report("timeline_now_time_vs_all_snapshots", now / every)


def conveyor_memory(drives: int = 150, days: int = 220) -> None:
    from fixtures.conveyors.generate import generate

    folder = Path(tempfile.mkdtemp(prefix="causeline-bench-timeline-"))
    flags: dict[str, list[str]] = {"fleet": [], "small": []}
    for name, timeline in (("fleet", generate(drives, days, seed=21)),
                           ("small", generate(40, 90, seed=22))):
        for flag, log in LOGS.items():
            path = folder / name / f"{log}.parquet"
            path.parent.mkdir(parents=True, exist_ok=True)
            getattr(timeline, log).to_parquet(path, index=False)
            flags[name] += [flag, str(path)]
        if name == "fleet":
            report("timeline_conveyor_readings", str(len(timeline.readings)))
        if name == "fleet":
            in_process(timeline)
    cli = [sys.executable, "-m", "causeline.cli"]
    config = str(CONVEYORS / "config.yaml")
    subprocess.run([*cli, "train", "--config", config, *flags["small"], "--out",
                    str(folder / "bundle")], check=True, capture_output=True)
    read_mb, _ = peak([sys.executable, "-c", READ_ONLY, *flags["fleet"][1::2]])
    build_mb, build_s = peak([*cli, "build", "--config", config, *flags["fleet"],
                              "--out", str(folder / "snapshots.parquet")])
    now_mb, now_s = peak([*cli, "explain", "--bundle", str(folder / "bundle"), *flags["fleet"],
                          "--latest", "--out", str(folder / "now.csv")])
    report("timeline_read_logs_peak_mb", read_mb)
    report("timeline_build_peak_mb", build_mb)
    report("timeline_build_s", build_s)
    report("timeline_build_peak_vs_reading_logs", build_mb / read_mb)
    report("timeline_latest_peak_mb", now_mb)
    report("timeline_latest_s", now_s)
    report("timeline_latest_peak_vs_reading_logs", now_mb / read_mb)
    report("timeline_latest_time_vs_build", now_s / build_s)


def main() -> None:
    from causeline.service.features.logs import TimelineInputs
    from causeline.service.features.snapshots import build_snapshots, entity_features
    from causeline.training.config import load_config
    from fixtures.demo.timeline import generate_timeline

    config = load_config(ROOT / "fixtures" / "demo" / "timeline.yaml")
    started = time.perf_counter()
    timeline = generate_timeline(cases=480, days=365)
    report("timeline_generate_s", time.perf_counter() - started)
    inputs = TimelineInputs(timeline.readings, timeline.excursions, timeline.maintenance,
                            timeline.cases)
    readings = len(timeline.readings)
    report("timeline_readings", str(readings))
    spec = config.timeline
    assert spec is not None
    report("timeline_build_readings_per_s", rate(lambda: build_snapshots(spec, inputs), readings,
                                                 repeat=2))
    one = timeline.readings[timeline.readings["case_id"] == "DC-0001"].tail(6 * 8)
    history = timeline.maintenance[timeline.maintenance["case_id"] == "DC-0001"]
    single = TimelineInputs(one, None, history, timeline.cases)
    report("timeline_online_entities_per_s", rate(lambda: entity_features(config, single), 1))
    conveyor_memory()


if __name__ == "__main__":
    main()
