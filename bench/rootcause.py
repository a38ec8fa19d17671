"""Root-cause job at 10^5 and 10^6 rows: local engine against a 2-worker Dask LocalCluster.

"Rows" are demo snapshots scored; the job groups the *actual* events among them (the label
column), about 3 % of rows. Each run is a separate ``causeline rootcause`` process, watched with
psutil: wall time, the peak RSS of the command's own process (the client) and of its worker
processes (peak of the largest worker, and peak of their sum). The data are written once into a
cache folder (``CAUSELINE_BENCH_DIR``, default the temporary folder) as one Parquet file for the
local engine and as a folder of 100,000-row Parquet files for the Dask engine, and reused.

A second scenario has every row an event: a fresh simulation of the AI4I 2020 process
(fixtures/ai4i2020/simulate.py) with the label set on every row, in one Parquet file written by
pandas (one row group), grouped by a bundle trained on the public AI4I file: the local engine,
and the Dask engine with 1 and with 2 local workers, on the same file.

Usage: ``python bench/rootcause.py [ROWS ...] [--all-events N ...]`` (default 100000 1000000
and, for all-events, 200000; docs/scaling.md gives a documented run at 1,000,000).
"""

from __future__ import annotations

import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import pandas as pd
import psutil
from sklearn.metrics import adjusted_rand_score

from bench.common import ai4i_bundle, demo_bundle, report

DAYS = 365
PART_ROWS = 100_000
SIZES = (100_000, 1_000_000)
POLL = 0.1  # seconds between RSS samples


def _data(folder: Path, rows: int) -> tuple[Path, Path]:
    """One Parquet file and a folder of partitions holding about ``rows`` demo snapshots."""
    from fixtures.demo.generate import generate

    single = folder / f"cases-{rows}.parquet"
    parts = folder / f"cases-{rows}-parts"
    if not single.exists() or not parts.exists():
        table = generate(cases=max(1, round(rows / DAYS)), days=DAYS, seed=11)
        table.to_parquet(single, index=False)
        parts.mkdir(exist_ok=True)
        for number, start in enumerate(range(0, len(table), PART_ROWS)):
            chunk = table.iloc[start:start + PART_ROWS]
            chunk.to_parquet(parts / f"part-{number:04d}.parquet", index=False)
    return single, parts


def _watch(command: list[str]) -> dict[str, float]:
    """Run ``command``; wall time and peak RSS (MiB) of it and of its child processes."""
    started = time.perf_counter()
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    watched = psutil.Process(process.pid)
    client = workers_sum = worker_max = 0.0
    while process.poll() is None:
        try:
            client = max(client, watched.memory_info().rss)
            rss = []
            for child in watched.children(recursive=True):
                try:
                    rss.append(child.memory_info().rss)
                except psutil.Error:
                    continue
            if rss:
                workers_sum = max(workers_sum, sum(rss))
                worker_max = max(worker_max, max(rss))
        except psutil.Error:
            pass
        time.sleep(POLL)
    wall = time.perf_counter() - started
    err = process.stderr.read().decode() if process.stderr else ""
    if process.returncode != 0:
        raise SystemExit(f"{' '.join(command)} failed: {err.strip().splitlines()[-1:]}")
    mib = 1024.0 * 1024.0
    return {"wall_s": wall, "client_peak_rss_mib": client / mib,
            "worker_peak_rss_mib": worker_max / mib, "workers_peak_rss_sum_mib": workers_sum / mib}


ALL_EVENTS = (200_000,)


def all_events(folder: Path, rows: int) -> None:
    """Every row an event, one Parquet file of one row group: both engines, 1 and 2 workers."""
    from fixtures.ai4i2020.simulate import simulate

    bundle = ai4i_bundle(folder / "ai4i-bundle")
    data = folder / f"ai4i-all-events-{rows}.parquet"
    if not data.exists():
        table = simulate(rows=rows, seed=41)
        table["Machine failure"] = 1
        table.to_parquet(data, index=False)
    cli = [sys.executable, "-m", "causeline"]
    report(f"rootcause_all_events_{rows}_rows", rows)
    outs = {}
    for name, extra in (("local", []), ("dask_1_worker", ["--engine", "dask", "--workers", "1"]),
                        ("dask_2_workers", ["--engine", "dask", "--workers", "2"])):
        out = folder / f"out-all-{rows}-{name}"
        command = [*cli, "rootcause", "--bundle", str(bundle), "--events", str(data),
                   "--out", str(out), "--quiet", *extra]
        for key, value in _watch(command).items():
            if name == "local" and key.startswith("worker"):
                continue
            report(f"rootcause_all_events_{rows}_{name}_{key}", float(value))
        outs[name] = pd.read_csv(out / "event_groups.csv", usecols=["event_id", "group_id"])
    local = outs["local"]
    for name in ("dask_1_worker", "dask_2_workers"):
        other = outs[name]
        same = local["event_id"].tolist() == other["event_id"].tolist()
        ari = adjusted_rand_score(local["group_id"], other["group_id"]) if same else float("nan")
        report(f"rootcause_all_events_{rows}_groups_ari_local_vs_{name}", float(ari))


def main(argv: list[str]) -> None:
    everything = []
    if "--all-events" in argv:
        at = argv.index("--all-events")
        everything = [int(a) for a in argv[at + 1:]]
        argv = argv[:at]
    sizes = [int(a) for a in argv] or (list(SIZES) if not everything else [])
    everything = everything or ([] if argv else list(ALL_EVENTS))
    folder = Path(os.environ.get("CAUSELINE_BENCH_DIR") or tempfile.gettempdir())
    folder = folder / "causeline-bench-rootcause"
    folder.mkdir(parents=True, exist_ok=True)
    bundle = folder / "bundle"
    if not (bundle / "manifest.json").exists():
        demo_bundle(folder)
    cli = [sys.executable, "-m", "causeline"]
    env_note = "selection: actual events (label column), about 3 % of rows"
    report("rootcause_selection", env_note)
    report("rootcause_dask_cluster", "LocalCluster, 2 worker processes x 1 thread, 2GiB each")
    for rows in sizes:
        single, parts = _data(folder, rows)
        n = len(pd.read_parquet(single, columns=["snapshot_id"]))
        report(f"rootcause_{rows}_rows", n)
        outs = {}
        for engine, source in (("local", single), ("dask", parts)):
            out = folder / f"out-{rows}-{engine}"
            command = [*cli, "rootcause", "--bundle", str(bundle), "--events", str(source),
                       "--out", str(out), "--engine", engine]
            for key, value in _watch(command).items():
                if engine == "local" and key.startswith("worker"):
                    continue
                report(f"rootcause_{rows}_{engine}_{key}", float(value))
            outs[engine] = pd.read_csv(out / "event_groups.csv", usecols=["event_id", "group_id"])
        local, dask = outs["local"], outs["dask"]
        report(f"rootcause_{rows}_events", len(local))
        same = local["event_id"].tolist() == dask["event_id"].tolist()
        ari = adjusted_rand_score(local["group_id"], dask["group_id"]) if same else float("nan")
        report(f"rootcause_{rows}_groups_ari_local_vs_dask", float(ari))
    for rows in everything:
        all_events(folder, rows)


if __name__ == "__main__":
    main(sys.argv[1:])
