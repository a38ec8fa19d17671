"""Load: bounded loopback load at several concurrency levels, a bundle swap under load, and the
server's memory over the whole run.

Starts ``causeline serve`` on a free loopback port (prediction log on), then for each level of
concurrent keep-alive connections sends single-event scoring requests, stopping at a request
count or a time limit, whichever comes first. One more level runs while the bundle is reloaded
every half second. The server's resident memory (RSS, psutil if installed, else
``/proc/PID/status``) is sampled throughout; its growth from the end of the warm-up to the end of
the run is compared with a stated margin. Prints ``name: value`` lines.
"""

from __future__ import annotations

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

import argparse  # noqa: E402
import asyncio  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
import threading  # noqa: E402

from bench.client import Run, load, request_bytes  # noqa: E402
from bench.common import demo_bundle, report  # noqa: E402
from bench.serving import _events, _free_port, _wait_ready, server_env  # noqa: E402

# Growth allowed from the end of the warm-up to the end of the run: 10 % of the warmed-up RSS or
# 32 MiB, whichever is larger (allocator slack and the bounded log queue; a leak grows with load).
MARGIN_SHARE = 0.10
MARGIN_FLOOR_MIB = 32.0


def rss_mib(pid: int) -> float:
    """Resident memory of ``pid`` in MiB."""
    try:
        import psutil

        return float(psutil.Process(pid).memory_info().rss) / (1 << 20)
    except ImportError:
        pass
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return float(line.split()[1]) / 1024.0  # kB
    raise RuntimeError(f"no VmRSS for process {pid}")


class Sampler:
    """Samples a process's RSS every ``every`` seconds on a thread until stopped."""

    def __init__(self, pid: int, every: float = 0.2) -> None:
        self.pid = pid
        self.every = every
        self.samples: list[float] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def __enter__(self) -> Sampler:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join(5)
        self.samples.append(rss_mib(self.pid))

    def _run(self) -> None:
        while not self._stop.is_set():
            self.samples.append(rss_mib(self.pid))
            self._stop.wait(self.every)


def reloading(
    port: int, stop: threading.Event, every: float = 0.5
) -> tuple[list[int], threading.Thread]:
    """POST /v1/admin/reload every ``every`` seconds until ``stop``: the statuses, the thread."""
    import httpx

    statuses: list[int] = []

    def loop() -> None:
        with httpx.Client(base_url=f"http://127.0.0.1:{port}", timeout=60) as client:
            while not stop.is_set():
                statuses.append(client.post("/v1/admin/reload").status_code)
                stop.wait(every)

    thread = threading.Thread(target=loop, daemon=True)
    thread.start()
    return statuses, thread


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--bundle", type=Path, help="bundle to serve (default: train the demo)")
    parser.add_argument("--levels", default="1,4,8,16", help="concurrent connections per level")
    parser.add_argument("--requests", type=int, default=2000, help="per level, at most")
    parser.add_argument("--seconds", type=float, default=10.0, help="per level, at most")
    args = parser.parse_args(argv)

    scratch = Path(tempfile.mkdtemp(prefix="causeline-load-bench-"))
    bundle = args.bundle or demo_bundle(scratch / "demo")
    requests = [request_bytes({"events": [event]}) for event in _events(bundle)]
    port = _free_port()
    # Loopback only, so the reload endpoint may go without keys here.
    env = server_env(scratch, CAUSELINE_ADMIN_WITHOUT_KEYS="1")
    server = subprocess.Popen(
        [sys.executable, "-m", "causeline", "serve", "--bundle", str(bundle), "--port",
         str(port)], cwd=ROOT, env=env, stdout=subprocess.DEVNULL,
    )
    levels = [int(level) for level in args.levels.split(",")]
    runs: dict[str, Run] = {}
    try:
        _wait_ready(port, server)
        asyncio.run(load(port, requests, 500, 30.0, max(levels)))  # warm-up
        warmed = rss_mib(server.pid)
        with Sampler(server.pid) as memory:
            for level in levels:
                runs[f"c{level}"] = asyncio.run(
                    load(port, requests, args.requests, args.seconds, level))
            stop = threading.Event()
            reloads, reloader = reloading(port, stop)
            try:
                runs["swap_c8"] = asyncio.run(
                    load(port, requests, args.requests, args.seconds, 8))
            finally:
                stop.set()
                reloader.join(60)
    finally:
        server.terminate()
        server.wait(30)

    failed = 0
    for name, run in runs.items():
        failed += run.errors
        report(f"load_{name}_requests", str(len(run.latencies)))
        report(f"load_{name}_failed", str(run.errors))
        report(f"load_{name}_throughput_rps", len(run.latencies) / run.seconds)
        report(f"load_{name}_p50_ms", 1000 * run.percentile(0.50))
        report(f"load_{name}_p99_ms", 1000 * run.percentile(0.99))
    report("load_swap_reloads", str(len(reloads)))
    report("load_swap_reloads_refused", str(sum(status != 200 for status in reloads)))
    report("load_failed_requests_total", str(failed))
    end = memory.samples[-1]
    margin = max(MARGIN_SHARE * warmed, MARGIN_FLOOR_MIB)
    report("load_rss_warmed_mib", warmed)
    report("load_rss_peak_mib", max(memory.samples))
    report("load_rss_end_mib", end)
    report("load_rss_growth_mib", end - warmed)
    report("load_rss_margin_mib", margin)
    report("load_rss_samples", str(len(memory.samples)))
    within = end - warmed <= margin
    report("load_rss_within_margin", "yes" if within else "no")
    report("load_ok", "yes" if within and failed == 0 else "no")
    return 0 if within and failed == 0 else 1


if __name__ == "__main__":
    sys.exit(main())
