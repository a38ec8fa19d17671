"""A small asyncio HTTP/1.1 client for benchmarks that act on the server while loading it.

Plain keep-alive connections sending prepared requests, bounded by a request count and a time
limit. Too slow to saturate a server (``bench/serving.py`` uses wrk for that), but it runs in
the benchmark's own process, so ``bench/load.py`` can reload bundles mid-run and count every
answer.
"""

from __future__ import annotations

import asyncio
import json
import time
from dataclasses import dataclass, field
from typing import Any


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


async def load(
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


def request_bytes(body: dict[str, Any]) -> bytes:
    data = json.dumps(body).encode()
    head = (
        "POST /v1/score HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\n"
        f"Content-Length: {len(data)}\r\n\r\n"
    )
    return head.encode() + data
