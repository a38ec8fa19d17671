"""Compare the scoring path of two builds in-process, in alternating bursts on one CPU.

This machine's speed drifts by up to 2x over minutes, so two runs made one after the other
cannot tell a 5 % change from noise. This tool starts three processes pinned to one CPU: the
bare FastAPI endpoint of ``bench/serving.py``, the app built from ``--base`` (a git revision,
default ``HEAD``) and the app from the working tree. Each process drives its own ASGI app with
``--clients`` concurrent single-event requests (no sockets, so only the application's own work
is timed) and the parent asks them in turn, order flipped every round, for a short burst. Printed:
each build's median time per request, the median of the paired differences and the ratio of
each to the bare endpoint. Not part of ``make bench``; a tool for changes to the scoring path::

    .venv/bin/python bench/compare.py --base HEAD~1 --rounds 40
"""

from __future__ import annotations

import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

import argparse  # noqa: E402
import asyncio  # noqa: E402
import json  # noqa: E402
import os  # noqa: E402
import statistics  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from typing import Any  # noqa: E402

TREES = ["service", "training", "causeline", "bench", "fixtures"]


def _scope(body: bytes) -> dict[str, Any]:
    return {
        "type": "http", "asgi": {"version": "3.0"}, "http_version": "1.1", "method": "POST",
        "scheme": "http", "path": "/v1/score", "raw_path": b"/v1/score", "query_string": b"",
        "root_path": "", "client": ("127.0.0.1", 1), "server": ("127.0.0.1", 2),
        "headers": [(b"host", b"bench"), (b"content-type", b"application/json"),
                    (b"content-length", str(len(body)).encode())],
    }


async def _call(app: Any, body: bytes) -> None:
    sent: list[dict[str, Any]] = []
    delivered = False

    async def receive() -> dict[str, Any]:
        nonlocal delivered
        if not delivered:
            delivered = True
            return {"type": "http.request", "body": body, "more_body": False}
        await asyncio.sleep(3600)  # the client never disconnects
        return {"type": "http.disconnect"}

    async def send(message: dict[str, Any]) -> None:
        sent.append(message)

    await app(_scope(body), receive, send)
    if sent[0]["status"] != 200:
        raise RuntimeError(f"status {sent[0]['status']}: {sent[1:]}")


async def _drive(app: Any, bodies: list[bytes], requests: int, clients: int) -> float:
    """Seconds per request with ``clients`` concurrent clients."""
    async def client(offset: int) -> None:
        for number in range(requests // clients):
            await _call(app, bodies[(offset + number * clients) % len(bodies)])

    started = time.perf_counter()
    await asyncio.gather(*(client(offset) for offset in range(clients)))
    return (time.perf_counter() - started) / (requests // clients * clients)


def child(root: Path, bundle: Path, kind: str, clients: int) -> None:
    """Serve bursts on request: read a request count per line, print microseconds per request."""
    shim = tempfile.TemporaryDirectory(prefix="causeline-compare-shim-")
    if _import_from(root, Path(shim.name)):
        from causeline.service.api.app import create_app
        from causeline.service.api.settings import Settings
        service_file = sys.modules["causeline.service"].__file__
    else:  # revisions before it: a top-level `service` package
        from service.settings import Settings  # type: ignore[no-redef]

        from service.api import create_app  # type: ignore[no-redef]
        service_file = sys.modules["service"].__file__
    from bench.serving import _events, bare_app

    if not Path(str(service_file)).resolve().is_relative_to(root.resolve()):
        raise SystemExit(f"service was imported from {service_file}, not from {root}")

    bodies = [json.dumps({"events": [event]}).encode() for event in _events(bundle)]
    log = tempfile.TemporaryDirectory(prefix="causeline-compare-log-")

    async def main() -> None:
        if kind == "bare":
            app = bare_app()
        else:
            app = create_app(Settings(bundle=bundle, prediction_log=log.name, access_log=False))
        async with app.router.lifespan_context(app):
            await _drive(app, bodies, 400, clients)  # warm-up: numba, caches
            print("ready", flush=True)
            loop = asyncio.get_running_loop()
            while (line := await loop.run_in_executor(None, sys.stdin.readline)).strip():
                seconds = await _drive(app, bodies, int(line), clients)
                print(f"{seconds * 1e6:.2f}", flush=True)

    with log, shim:
        asyncio.run(main())


def _import_from(root: Path, shim: Path) -> bool:
    """Make ``import causeline`` load ``root``'s code, not the installed working tree's.

    The package's subpackages live in the top-level folders ``service/`` and ``training/``;
    a ``causeline`` folder of links puts them where Python looks for ``causeline.service``.
    False for the older layout, whose top-level ``service`` package imports from ``root``.
    """
    sys.path.insert(0, str(root))
    if not (root / "service" / "api").is_dir():
        return False
    package = shim / "causeline"
    package.mkdir()
    for item in (root / "causeline").iterdir():
        (package / item.name).symlink_to(item)
    for folder in ("service", "training"):
        if (root / folder).is_dir():
            (package / folder).symlink_to(root / folder)
    sys.path.insert(0, str(shim))
    return True


def _export(revision: str, folder: Path) -> Path:
    archive = subprocess.run(["git", "archive", revision, *TREES], cwd=ROOT, check=True,
                             capture_output=True).stdout
    subprocess.run(["tar", "-x", "-C", str(folder)], input=archive, check=True)
    return folder


def _measure(
    roots: dict[str, Path], bundle: Path, args: argparse.Namespace
) -> dict[str, list[float]]:
    """Microseconds per request of each build, burst by burst, all pinned to one CPU."""
    cpus = sorted(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else []
    processes = {}
    for name, root in roots.items():
        command = [sys.executable, __file__, "--bundle", str(bundle), "--clients",
                   str(args.clients), "--child", str(root), "bare" if name == "bare" else "score"]
        process = subprocess.Popen(command, cwd=root, stdin=subprocess.PIPE,
                                   stdout=subprocess.PIPE, text=True)
        if cpus:
            os.sched_setaffinity(process.pid, {cpus[0]})
        processes[name] = process
    times: dict[str, list[float]] = {name: [] for name in processes}
    try:
        for name, process in processes.items():
            assert process.stdout is not None
            if process.stdout.readline().strip() != "ready":
                raise SystemExit(f"the {name} build did not start")
        for number in range(args.rounds):
            order = ["bare", "base", "new"] if number % 2 == 0 else ["bare", "new", "base"]
            for name in order:
                process = processes[name]
                assert process.stdin is not None and process.stdout is not None
                process.stdin.write(f"{args.requests}\n")
                process.stdin.flush()
                times[name].append(float(process.stdout.readline()))
    finally:
        for process in processes.values():
            if process.stdin is not None and process.poll() is None:
                process.stdin.write("\n")
                process.stdin.close()
            process.wait(60)
    return times


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--base", default="HEAD", help="git revision to compare against")
    parser.add_argument("--bundle", type=Path, help="bundle to serve (default: train the demo)")
    parser.add_argument("--rounds", type=int, default=40)
    parser.add_argument("--requests", type=int, default=300, help="per burst")
    parser.add_argument("--clients", type=int, default=8)
    parser.add_argument("--child", nargs=2, metavar=("ROOT", "KIND"), help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.child:
        child(Path(args.child[0]), args.bundle, args.child[1], args.clients)
        return 0

    sys.path.insert(0, str(ROOT))
    from bench.common import demo_bundle, report

    with tempfile.TemporaryDirectory(prefix="causeline-compare-") as scratch:
        bundle = args.bundle or demo_bundle(Path(scratch) / "demo")
        base = Path(scratch) / "base"
        base.mkdir()
        times = _measure({"bare": ROOT, "base": _export(args.base, base), "new": ROOT}, bundle,
                         args)
    for name, values in times.items():
        report(f"compare_{name}_us_per_request", statistics.median(values))
    differences = [new - base for base, new in zip(times["base"], times["new"], strict=True)]
    relative = [d / base for d, base in zip(differences, times["base"], strict=True)]
    report("compare_new_minus_base_us", statistics.median(differences))
    report("compare_new_minus_base_percent", 100 * statistics.median(relative))
    for name in ("base", "new"):
        report(f"compare_{name}_over_bare", statistics.median(
            [t / b for t, b in zip(times[name], times["bare"], strict=True)]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
