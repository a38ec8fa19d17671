"""HTTP: single-event scoring with reason codes against a bare endpoint, driven by wrk.

Starts two real servers on free loopback ports with the same uvicorn settings (worker count, no
access log): ``causeline serve`` (prediction log on) and a FastAPI app whose ``async def``
endpoint reads the JSON body and answers a fixed result. The served bundle is trained on the
public AI4I 2020 file, the set-up the serving targets were set on (``--model demo``: the demo
fleet's, a larger model; ``--bundle``/``--events``: your own). wrk (C, one thread, a Lua script
posting one event per request, rotating through 200 events of the bundle's data) then drives
each at 1, 8 and 32 connections. Rounds alternate between the servers, order flipped every
round, so a slow spell of the machine falls on both; each round's ratio compares two runs made
back to back. Printed as ``name: value`` lines, per connection count: requests per second, the
ratio causeline/bare, p50, p99, p99.9 and max latency, failed requests (non-2xx answers and
socket errors) and the cores each server used. The ratio is the median of the rounds' ratios
(``_ratio_worst``: the lowest; a single round moves with the machine's speed, which varied
twofold between runs on the project's VM); throughput and latencies are the worst round's.
The SHAP kernel's cost per event, measured in this process on the same events, is printed
with the model's size: it is the part of a request's time that grows with the model.
Last, a soak run drives causeline alone for ``--soak`` seconds and prints its resident memory
as it goes, then whether the targets were met.

wrk corrects its latencies for coordinated omission: a request that took T ms at a time when
one usually takes t adds samples at T - t, T - 2t, ... (the requests a steady client would have
sent meanwhile), so a rare long stall shows in p99, as callers with timeouts would see it.

wrk is Debian's ``wrk`` package: when it is missing, this installs it with apt-get (as root),
or stops with the command to run.
"""

from __future__ import annotations

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import argparse  # noqa: E402
import contextlib  # noqa: E402
import json  # noqa: E402
import os  # noqa: E402
import re  # noqa: E402
import shutil  # noqa: E402
import socket  # noqa: E402
import statistics  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
import threading  # noqa: E402
import time  # noqa: E402
from dataclasses import dataclass  # noqa: E402
from typing import Any  # noqa: E402

from fastapi import FastAPI, Request  # noqa: E402

from bench.common import AI4I, ai4i_bundle, demo_bundle, report  # noqa: E402

SERVERS = ("bare", "score")  # "score" is causeline serve
UNITS = {"us": 1e-3, "ms": 1.0, "s": 1e3}


def bare_app() -> Any:
    """The baseline: the same framework reading the JSON body and answering a fixed result.

    (``Request`` is imported at module level: FastAPI resolves the annotation there.)
    """
    app = FastAPI()

    @app.post("/v1/score")
    async def score(request: Request) -> dict[str, bool]:
        await request.json()
        return {"ok": True}

    @app.get("/v1/health/ready")
    async def ready() -> dict[str, str]:
        return {"status": "ready"}

    return app


# ---------------------------------------------------------------- wrk


def ensure_wrk() -> str:
    """The wrk program; installs Debian's package first when it is missing and we may."""
    found = shutil.which("wrk")
    if found:
        return found
    command = ["apt-get", "install", "-y", "wrk"]
    if os.geteuid() != 0 or shutil.which("apt-get") is None:
        raise SystemExit("bench/serving.py needs wrk, the HTTP load generator: install it with "
                         "`sudo apt-get install -y wrk` (Debian/Ubuntu) and run again")
    print("# wrk is missing: installing Debian's package (apt-get install -y wrk)", flush=True)
    quiet = {"stdout": subprocess.DEVNULL, "env": {**os.environ,
                                                    "DEBIAN_FRONTEND": "noninteractive"}}
    if subprocess.run(command, check=False, **quiet).returncode != 0:
        subprocess.run(["apt-get", "update"], check=False, **quiet)
        subprocess.run(command, check=False, **quiet)
    found = shutil.which("wrk")
    if not found:
        raise SystemExit("could not install wrk; install it with `apt-get install -y wrk`")
    return found


def lua_script(bodies: list[str]) -> str:
    """A wrk script posting ``bodies`` in turn; ``done`` prints counts and p99.9 and max."""
    literals = ",\n".join(_lua_string(body) for body in bodies)
    return f"""-- Written by bench/serving.py: one event per request, in turn.
local bodies = {{
{literals}
}}
local requests = {{}}
local turn = 0

function init(args)
  for i, body in ipairs(bodies) do
    requests[i] = wrk.format("POST", "/v1/score", {{["Content-Type"] = "application/json"}}, body)
  end
end

function request()
  turn = turn % #requests + 1
  return requests[turn]
end

function done(summary, latency, requests)
  local e = summary.errors
  io.write(string.format(
    "bench: requests=%d duration_us=%d connect=%d read=%d write=%d status=%d timeout=%d " ..
    "p99_9_us=%d max_us=%d\\n",
    summary.requests, summary.duration, e.connect, e.read, e.write, e.status, e.timeout,
    latency:percentile(99.9), latency.max))
end
"""


def _lua_string(text: str) -> str:
    return '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'


@dataclass
class Round:
    """One wrk run against one server."""

    rps: float
    p50: float  # milliseconds, from wrk's --latency distribution
    p99: float
    p99_9: float  # from the script's done()
    max: float
    requests: int
    failed: int  # non-2xx answers (wrk counts status > 399) and socket errors
    cores: float  # the server's CPU seconds per second of the run


def parse_wrk(output: str) -> dict[str, float]:
    """Requests per second, --latency percentiles (ms) and the script's counts."""
    values: dict[str, float] = {}
    for share, number, unit in re.findall(r"^\s+(50|75|90|99)%\s+([\d.]+)(us|ms|s)\s*$",
                                          output, re.M):
        values[f"p{share}"] = float(number) * UNITS[unit]
    rate = re.search(r"^Requests/sec:\s+([\d.]+)", output, re.M)
    line = re.search(r"^bench: (.*)$", output, re.M)
    if rate is None or line is None or "p99" not in values:
        raise RuntimeError(f"unexpected wrk output:\n{output}")
    values["rps"] = float(rate.group(1))
    for pair in line.group(1).split():
        name, _, number = pair.partition("=")
        values[name] = float(number)
    return values


def run_wrk(wrk: str, port: int, connections: int, seconds: int, script: Path,
            server_pid: int, cpus: set[int] | None = None) -> Round:
    command = [wrk, "-t1", f"-c{connections}", f"-d{seconds}s", "--timeout", "2s", "--latency",
               "-s", str(script), f"http://127.0.0.1:{port}/v1/score"]
    cpu_before, started = _cpu_seconds(server_pid), time.perf_counter()
    result = subprocess.run(command, capture_output=True, text=True, check=False,
                            preexec_fn=(lambda: os.sched_setaffinity(0, cpus)) if cpus else None)
    wall = time.perf_counter() - started
    cores = (_cpu_seconds(server_pid) - cpu_before) / wall
    if result.returncode != 0:
        raise RuntimeError(f"wrk failed ({result.returncode}): {result.stderr.strip()}")
    values = parse_wrk(result.stdout)
    failed = sum(int(values[name]) for name in ("connect", "read", "write", "status", "timeout"))
    return Round(rps=values["rps"], p50=values["p50"], p99=values["p99"],
                 p99_9=values["p99_9_us"] / 1000, max=values["max_us"] / 1000,
                 requests=int(values["requests"]), failed=failed, cores=cores)


# ---------------------------------------------------------------- servers


def server_env(scratch: Path, **extra: str) -> dict[str, str]:
    """The environment a benchmarked server runs with: no settings from the caller's shell."""
    env = {key: value for key, value in os.environ.items() if not key.startswith("CAUSELINE_")}
    env.update({"CAUSELINE_ACCESS_LOG": "0", "CAUSELINE_LOG_LEVEL": "warning",
                "CAUSELINE_PREDICTION_LOG": str(scratch / "predictions"),
                "PYTHONPATH": str(ROOT), **extra})
    return env


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def _wait_ready(port: int, process: subprocess.Popen[bytes], seconds: float = 120.0) -> None:
    import httpx

    deadline = time.monotonic() + seconds
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise SystemExit(f"server on port {port} exited with {process.returncode}")
        try:
            if httpx.get(f"http://127.0.0.1:{port}/v1/health/ready").status_code == 200:
                return
        except httpx.TransportError:
            pass
        time.sleep(0.2)
    raise SystemExit(f"server on port {port} did not become ready")


def _family(pid: int) -> list[int]:
    """A process and its descendants (uvicorn's workers when there are several)."""
    out, queue = [], [pid]
    while queue:
        current = queue.pop()
        out.append(current)
        for task in Path(f"/proc/{current}/task").glob("*"):
            with contextlib.suppress(OSError):
                queue += [int(child) for child in (task / "children").read_text().split()]
    return out


def _cpu_seconds(pid: int) -> float:
    """User and system CPU time of a server and its workers so far."""
    total = 0.0
    for member in _family(pid):
        try:
            fields = Path(f"/proc/{member}/stat").read_text().rsplit(")", 1)[1].split()
        except OSError:
            continue
        total += (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
    return total


def rss_mb(pid: int) -> float:
    """Resident memory of a server and its workers, in MiB."""
    total = 0
    for member in _family(pid):
        try:
            status = Path(f"/proc/{member}/status").read_text()
        except OSError:
            continue
        found = re.search(r"^VmRSS:\s+(\d+) kB", status, re.M)
        total += int(found.group(1)) if found else 0
    return total / 1024


def _mean_batch(port: int) -> float:
    """Events per explanation call, from the server's own metrics (batching at work)."""
    import httpx

    text = httpx.get(f"http://127.0.0.1:{port}/metrics").text
    totals = {}
    for line in text.splitlines():
        name, _, value = line.partition(" ")
        if name in {"causeline_explain_batch_rows_sum", "causeline_explain_batch_rows_count"}:
            totals[name] = float(value)
    count = totals.get("causeline_explain_batch_rows_count", 0.0)
    return totals.get("causeline_explain_batch_rows_sum", 0.0) / count if count else float("nan")


def _events(bundle: Path, rows: int = 200, source: Path | None = None,
            loaded: Any = None) -> list[dict[str, Any]]:
    """The last ``rows`` events of ``source`` (default: the table beside the bundle, else a
    small demo fleet), with only the fields of the bundle (``loaded``: already loaded)."""
    import pandas as pd

    from causeline.service.bundle.load import load_bundle

    loaded = loaded or load_bundle(bundle)
    columns = [*loaded.builder.required_columns, loaded.spec.id]
    source = source or bundle.parent / "cases.parquet"
    if source.is_file():
        table = pd.read_csv(source) if source.suffix == ".csv" else pd.read_parquet(source)
    else:
        from fixtures.demo.generate import generate

        table = generate(cases=20, days=20)
    return json.loads(table[columns].tail(rows).to_json(orient="records"))


def kernel_cost(loaded: Any, events: list[dict[str, Any]]) -> tuple[float, str]:
    """Microseconds of the SHAP kernel per single-event call (warm, in this process), and the
    model's size: the share of a request's time that grows with the model."""
    from causeline.service.explain.fastshap import FastTreeExplainer

    engine = FastTreeExplainer(loaded.booster)
    rows = [loaded.builder.transform_records([event]).values for event in events]
    for row in rows:
        engine.contributions(row)
    started = time.perf_counter()
    for _ in range(5):
        for row in rows:
            engine.contributions(row)
    took = (time.perf_counter() - started) / (5 * len(rows)) * 1e6
    trees = loaded.booster.dump_model()["tree_info"]
    size = f"{len(trees)} trees, {sum(t['num_leaves'] for t in trees)} leaves"
    return took, size


def _cpus(pin: bool) -> tuple[set[int] | None, set[int] | None]:
    """With ``pin``: the servers on the first CPU, wrk on the others (None: not pinned)."""
    cpus = sorted(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else []
    if not pin or len(cpus) < 2:
        return None, None
    return {cpus[0]}, set(cpus[1:])


# ---------------------------------------------------------------- the run


def soak(wrk: str, port: int, pid: int, seconds: int, script: Path,
         cpus: set[int] | None) -> tuple[Round, list[tuple[float, float]]]:
    """One long run at 8 connections, with the server's memory read every few seconds."""
    samples: list[tuple[float, float]] = [(0.0, rss_mb(pid))]
    finished = threading.Event()
    started = time.perf_counter()

    def sample() -> None:
        while not finished.wait(max(1.0, seconds / 12)):
            samples.append((time.perf_counter() - started, rss_mb(pid)))

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    try:
        result = run_wrk(wrk, port, 8, seconds, script, pid, cpus)
    finally:
        finished.set()
        sampler.join()
    samples.append((time.perf_counter() - started, rss_mb(pid)))
    return result, samples


def summarise(connections: int, rounds: dict[str, list[Round]]) -> dict[str, float]:
    """Print one connection count's lines; returns the worst figures for the target check."""
    worst: dict[str, float] = {}
    for name in SERVERS:
        runs = rounds[name]
        prefix = f"http_c{connections}_{name}"
        report(f"{prefix}_rps", min(r.rps for r in runs))
        report(f"{prefix}_rps_rounds", " ".join(f"{r.rps:.0f}" for r in runs))
        for field, label in (("p50", "p50"), ("p99", "p99"), ("p99_9", "p99_9"), ("max", "max")):
            value = max(getattr(r, field) for r in runs)
            report(f"{prefix}_{label}_ms", value)
            worst[f"{name}_{label}"] = value
        report(f"{prefix}_p99_ms_rounds", " ".join(f"{r.p99:.2f}" for r in runs))
        report(f"{prefix}_failed", sum(r.failed for r in runs))
        report(f"{prefix}_requests", sum(r.requests for r in runs))
        report(f"{prefix}_cores", statistics.median(r.cores for r in runs))
        worst[f"{name}_failed"] = sum(r.failed for r in runs)
    ratios = [s.rps / b.rps for b, s in zip(rounds["bare"], rounds["score"], strict=True)]
    report(f"http_c{connections}_ratio", statistics.median(ratios))
    report(f"http_c{connections}_ratio_worst", min(ratios))
    report(f"http_c{connections}_ratio_rounds", " ".join(f"{r:.3f}" for r in ratios))
    worst["ratio"] = statistics.median(ratios)
    worst["ratio_worst"] = min(ratios)
    return worst


def targets(worst: dict[int, dict[str, float]]) -> None:
    """The serving targets, judged on the worst round."""
    def line(name: str, met: bool, text: str) -> None:
        report(f"http_target_{name}", f"{'met' if met else 'NOT MET'} ({text})")

    if 8 in worst:
        w = worst[8]
        line("c8_p99", w["score_p99"] <= 10.0, f"{w['score_p99']:.2f} ms <= 10 ms")
        line("c8_ratio", w["ratio"] >= 0.8, f"median of the paired rounds {w['ratio']:.3f} "
             f">= 0.8; worst round {w['ratio_worst']:.3f}")
        line("c8_failed", w["score_failed"] == 0, f"{w['score_failed']:.0f} failed")
    if 32 in worst:
        w = worst[32]
        limit = 4 * w["bare_p99"] + 10.0
        line("c32_p99", w["score_p99"] <= limit, f"{w['score_p99']:.2f} ms <= 4 x "
             f"{w['bare_p99']:.2f} + 10 = {limit:.2f} ms")


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--model", choices=("ai4i", "demo"), default="ai4i",
                        help="bundle to train and serve: the public AI4I 2020 file's (as the "
                             "targets were set) or the demo fleet's (a larger model)")
    parser.add_argument("--bundle", type=Path, help="serve this bundle instead")
    parser.add_argument("--events", type=Path,
                        help="CSV or Parquet file of events for --bundle (default: the "
                             "cases.parquet beside it)")
    parser.add_argument("--workers", type=int, default=1)
    parser.add_argument("--connections", default="1,8,32", help="comma-separated")
    parser.add_argument("--seconds", type=int, default=5, help="per wrk run")
    parser.add_argument("--rounds", type=int, default=4, help="alternating rounds per server")
    parser.add_argument("--soak", type=int, default=60,
                        help="seconds of the memory run at 8 connections (0: none)")
    parser.add_argument("--pin", action="store_true",
                        help="servers on the first CPU, wrk on the others")
    args = parser.parse_args(argv)
    wrk = ensure_wrk()
    counts = [int(part) for part in args.connections.split(",") if part.strip()]

    scratch = Path(tempfile.mkdtemp(prefix="causeline-http-bench-"))
    source = args.events
    if args.bundle is not None:
        bundle = args.bundle
    elif args.model == "ai4i":
        bundle, source = ai4i_bundle(scratch / "ai4i"), AI4I / "ai4i2020.csv"
    else:
        bundle = demo_bundle(scratch / "demo")
    from causeline.service.bundle.load import load_bundle

    loaded = load_bundle(bundle)
    events = _events(bundle, source=source, loaded=loaded)
    kernel, size = kernel_cost(loaded, events)
    script = scratch / "post.lua"
    script.write_text(lua_script([json.dumps({"events": [event]}) for event in events]), "utf-8")
    env = server_env(scratch)
    ports = {name: _free_port() for name in SERVERS}
    commands = {
        "bare": [sys.executable, "-m", "uvicorn", "bench.serving:bare_app", "--factory",
                 "--port", str(ports["bare"]), "--workers", str(args.workers),
                 "--no-access-log", "--log-level", "warning", "--no-server-header"],
        "score": [sys.executable, "-m", "causeline", "serve", "--bundle", str(bundle),
                  "--port", str(ports["score"]), "--workers", str(args.workers)],
    }
    server_cpus, wrk_cpus = _cpus(args.pin)
    processes = {
        name: subprocess.Popen(
            command, cwd=ROOT, env=env, stdout=subprocess.DEVNULL,
            preexec_fn=(lambda: os.sched_setaffinity(0, server_cpus)) if server_cpus else None)
        for name, command in commands.items()
    }
    rounds: dict[int, dict[str, list[Round]]] = {c: {n: [] for n in SERVERS} for c in counts}
    try:
        for name, port in ports.items():
            _wait_ready(port, processes[name])
            run_wrk(wrk, port, 8, 2, script, processes[name].pid, wrk_cpus)  # warm-up
        # Rounds alternate between the servers (order flipped every round), the connection
        # counts inside each round, so that drift of the machine's speed falls on all alike.
        for number in range(args.rounds):
            order = SERVERS if number % 2 == 0 else tuple(reversed(SERVERS))
            for connections in counts:
                for name in order:
                    rounds[connections][name].append(run_wrk(
                        wrk, ports[name], connections, args.seconds, script,
                        processes[name].pid, wrk_cpus))
        batch = _mean_batch(ports["score"])
        soaked = None
        if args.soak > 0:
            soaked = soak(wrk, ports["score"], processes["score"].pid, args.soak, script,
                          wrk_cpus)
    finally:
        for process in processes.values():
            process.terminate()
        for process in processes.values():
            process.wait(60)
    report("http_model", f"{args.bundle or args.model} ({size})")
    report("http_kernel_us_per_event", kernel)
    report("http_wrk", f"{wrk}, 1 thread, {args.seconds} s per run")
    report("http_workers", str(args.workers))
    report("http_rounds", str(args.rounds))
    report("http_pinned", "servers on CPU " + ",".join(map(str, sorted(server_cpus)))
           if server_cpus else "no")
    worst = {connections: summarise(connections, rounds[connections]) for connections in counts}
    report("http_score_mean_batch_events", batch)
    if soaked is not None:
        result, samples = soaked
        report("http_soak_seconds", str(args.soak))
        report("http_soak_rps", result.rps)
        report("http_soak_p99_ms", result.p99)
        report("http_soak_max_ms", result.max)
        report("http_soak_failed", result.failed)
        report("http_soak_rss_start_mb", samples[0][1])
        report("http_soak_rss_end_mb", samples[-1][1])
        report("http_soak_rss_mb", " ".join(f"{t:.0f}s={mb:.1f}" for t, mb in samples))
    targets(worst)
    return 0


if __name__ == "__main__":
    sys.exit(main())
