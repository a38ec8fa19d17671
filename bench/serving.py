"""HTTP: single-event scoring with reason codes against a bare endpoint of the same framework.

Starts two real servers on free loopback ports with the same uvicorn settings (worker count, no
access log): ``causeline serve`` on the demo bundle, and a FastAPI app whose endpoint returns a
constant JSON. Then sends each the same single-event requests from a small asyncio load generator
(plain HTTP/1.1 keep-alive, ``--connections`` at a time, bounded by a request count and a time
limit) and prints ``name: value`` lines: throughput, p50/p99 latency and the throughput ratio,
the median over alternating rounds of each round's ratio, with every round's rate so drift
shows.
"""

from __future__ import annotations

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import argparse  # noqa: E402
import asyncio  # noqa: E402
import json  # noqa: E402
import os  # noqa: E402
import socket  # noqa: E402
import statistics  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from dataclasses import dataclass, field  # noqa: E402
from typing import Any  # noqa: E402

from bench.common import demo_bundle, report  # noqa: E402


def bare_app() -> Any:
    """The baseline: the same framework answering a constant JSON, no work at all."""
    from fastapi import FastAPI

    app = FastAPI()

    @app.post("/v1/score")
    async def score() -> dict[str, bool]:
        return {"ok": True}

    @app.get("/v1/health/ready")
    async def ready() -> dict[str, str]:
        return {"status": "ready"}

    return app


@dataclass
class Run:
    """Latencies (seconds) and failures of one measured run."""

    latencies: list[float] = field(default_factory=list)
    errors: int = 0
    seconds: float = 0.0

    def percentile(self, share: float) -> float:
        ordered = sorted(self.latencies)
        if not ordered:
            return float("nan")
        return ordered[min(len(ordered) - 1, int(share * len(ordered)))]


async def _read_response(reader: asyncio.StreamReader) -> tuple[int, bytes]:
    head = await reader.readuntil(b"\r\n\r\n")
    lines = head.decode("latin-1").split("\r\n")
    status = int(lines[0].split()[1])
    length = 0
    for line in lines[1:]:
        name, _, value = line.partition(":")
        if name.strip().lower() == "content-length":
            length = int(value.strip())
    return status, await reader.readexactly(length)


async def _load(
    port: int, requests: list[bytes], count: int, seconds: float, connections: int
) -> Run:
    run = Run()
    remaining = count
    stop_at = time.perf_counter() + seconds

    async def connection(offset: int) -> None:
        nonlocal remaining
        reader, writer = await asyncio.open_connection("127.0.0.1", port)
        sent = offset
        try:
            while remaining > 0 and time.perf_counter() < stop_at:
                remaining -= 1
                started = time.perf_counter()
                writer.write(requests[sent % len(requests)])
                sent += 1
                status, _ = await _read_response(reader)
                run.latencies.append(time.perf_counter() - started)
                run.errors += status != 200
        except (OSError, asyncio.IncompleteReadError, ValueError):
            run.errors += 1  # a dropped connection or a broken answer: a failed request
        finally:
            writer.close()

    started = time.perf_counter()
    await asyncio.gather(*(connection(i) for i in range(connections)))
    run.seconds = time.perf_counter() - started
    return run


def _request(body: dict[str, Any]) -> bytes:
    data = json.dumps(body).encode()
    head = (
        "POST /v1/score HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\n"
        f"Content-Length: {len(data)}\r\n\r\n"
    )
    return head.encode() + data


def _pin(processes: dict[str, subprocess.Popen[bytes]]) -> str:
    """Servers on one CPU, this load generator on the others, the same for both servers.

    Left to the scheduler, the generator and a server sometimes share a core and sometimes
    not, which moved the bare endpoint's throughput by half from run to run.
    """
    cpus = sorted(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else []
    if len(cpus) < 2:
        return "no"
    for process in processes.values():
        os.sched_setaffinity(process.pid, {cpus[0]})
    os.sched_setaffinity(0, set(cpus[1:]))
    return str(cpus[0])


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


def _events(bundle: Path, rows: int = 200) -> list[dict[str, Any]]:
    import pandas as pd

    from causeline.service.bundle.load import load_bundle

    loaded = load_bundle(bundle)
    columns = [*loaded.builder.required_columns, loaded.spec.id]
    table = pd.read_parquet(bundle.parent / "cases.parquet") if (
        bundle.parent / "cases.parquet").is_file() else None
    if table is None:
        from fixtures.demo.generate import generate

        table = generate(cases=20, days=20)
    return json.loads(table[columns].tail(rows).to_json(orient="records"))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--bundle", type=Path, help="bundle to serve (default: train the demo)")
    parser.add_argument("--workers", type=int, default=1)
    parser.add_argument("--connections", type=int, default=8)
    parser.add_argument("--requests", type=int, default=16000, help="per server, at most")
    parser.add_argument("--seconds", type=float, default=40.0, help="per server, at most")
    parser.add_argument("--rounds", type=int, default=16, help="alternating rounds per server")
    args = parser.parse_args(argv)

    scratch = Path(tempfile.mkdtemp(prefix="causeline-http-bench-"))
    bundle = args.bundle or demo_bundle(scratch / "demo")
    requests = [_request({"events": [event]}) for event in _events(bundle)]
    env = server_env(scratch)
    ports = {"bare": _free_port(), "score": _free_port()}
    commands = {
        "bare": [sys.executable, "-m", "uvicorn", "bench.serving:bare_app", "--factory",
                 "--port", str(ports["bare"]), "--workers", str(args.workers),
                 "--no-access-log", "--log-level", "warning", "--no-server-header"],
        "score": [sys.executable, "-m", "causeline", "serve", "--bundle", str(bundle),
                  "--port", str(ports["score"]), "--workers", str(args.workers)],
    }
    processes = {
        name: subprocess.Popen(command, cwd=ROOT, env=env, stdout=subprocess.DEVNULL)
        for name, command in commands.items()
    }
    pinned = _pin(processes)
    try:
        for name, port in ports.items():
            _wait_ready(port, processes[name])
            asyncio.run(_load(port, requests, 300, 30.0, args.connections))  # warm-up
        # Rounds alternate between the two servers so that a slow spell of the machine falls
        # on both, and the order flips every round (bare first, then score first) so that a
        # machine getting steadily faster or slower favours neither.
        rounds: dict[str, list[Run]] = {name: [] for name in ports}
        for number in range(args.rounds):
            order = list(ports) if number % 2 == 0 else list(reversed(ports))
            for name in order:
                rounds[name].append(asyncio.run(_load(
                    ports[name], requests, args.requests // args.rounds,
                    args.seconds / args.rounds, args.connections,
                )))
        batch = _mean_batch(ports["score"])
    finally:
        for process in processes.values():
            process.terminate()
        for process in processes.values():
            process.wait(30)
    report("http_workers", str(args.workers))
    report("http_connections", str(args.connections))
    report("http_rounds", str(args.rounds))
    report("http_servers_pinned_to_cpu", pinned)
    throughput = {}
    for name, runs in rounds.items():
        rates = [len(run.latencies) / run.seconds for run in runs]
        throughput[name] = statistics.median(rates)
        pooled = Run()
        for run in runs:
            pooled.latencies.extend(run.latencies)
            pooled.errors += run.errors
        report(f"http_{name}_requests", str(len(pooled.latencies)))
        report(f"http_{name}_errors", str(pooled.errors))
        report(f"http_{name}_throughput_rps", throughput[name])
        report(f"http_{name}_rounds_rps", " ".join(f"{rate:.0f}" for rate in rates))
        report(f"http_{name}_p50_ms", 1000 * pooled.percentile(0.50))
        report(f"http_{name}_p99_ms", 1000 * pooled.percentile(0.99))
    # The ratio is taken round by round: a round's two runs are back to back, within about a
    # second, so a slower spell of the machine (this VM's speed drifts by up to 2x over
    # minutes) touches both alike. The median over rounds is the result; the ratio of the two
    # servers' median rates, which drift does move, is printed beside it.
    paired = [
        (len(s.latencies) / s.seconds) / (len(b.latencies) / b.seconds)
        for b, s in zip(rounds["bare"], rounds["score"], strict=True)
    ]
    report("http_throughput_ratio", statistics.median(paired))
    report("http_throughput_ratio_range", f"{min(paired):.3f}-{max(paired):.3f}")
    report("http_throughput_ratio_of_median_rates", throughput["score"] / throughput["bare"])
    report("http_score_mean_batch_events", batch)
    return 0


if __name__ == "__main__":
    sys.exit(main())
