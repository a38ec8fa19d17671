"""Where the Dask engine runs: a given scheduler, or a LocalCluster started for the run; results
streamed back in input order with a bounded number in flight; the bundle loaded once per worker.

Workers receive the bundle's *path*, never a model: each worker loads and verifies the bundle once
(:func:`worker_explainer`) and keeps it, so the path must be readable on every worker (a shared
volume). Without a scheduler address a :class:`~distributed.LocalCluster` is started for the run
and closed at its end.
"""

from __future__ import annotations

import logging
import os
from collections import deque
from collections.abc import Callable, Iterator
from concurrent.futures import CancelledError
from contextlib import contextmanager
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any

import dask
from dask.utils import parse_bytes
from distributed import Client, LocalCluster
from distributed.comm.core import CommClosedError
from distributed.scheduler import KilledWorker

from causeline.service.bundle.load import load_bundle
from causeline.service.dask.partitions import PARTITION_MB
from causeline.service.errors import CauselineError, DataError, first_line
from causeline.service.explain.explainer import Explainer

# A LocalCluster sized for a small machine: two single-threaded worker processes (LightGBM and
# numba are not re-entrant-friendly with many threads per process, and processes sidestep the
# GIL). The limit is per worker; Dask spills and then pauses a worker that nears it.
LOCAL_WORKERS = 2


LOCAL_MEMORY_LIMIT = "2GiB"
CONNECT_TIMEOUT = 10  # seconds to reach a given scheduler before giving up


# Partitions explained ahead of the one being written: enough to keep every worker busy.
AHEAD = 2 * LOCAL_WORKERS


@dataclass(frozen=True)
class DaskSettings:
    """Where to run: a scheduler address, or a LocalCluster started for the run."""

    scheduler: str | None = None
    processes: bool = True
    workers: int = LOCAL_WORKERS
    memory_limit: str = LOCAL_MEMORY_LIMIT
    timeout: float | None = None  # seconds; None: CONNECT_TIMEOUT
    partition_mb: float = PARTITION_MB  # input per partition (see dask.partitions)


def memory_size(text: str) -> str:
    """A worker memory limit as Dask reads it (4GiB, 2.5GB, 800MiB); a clear error otherwise."""
    try:
        if parse_bytes(text) <= 0:
            raise ValueError
    except (ValueError, TypeError):
        raise CauselineError(f"--worker-memory {text!r}: give a size such as 4GiB or 800MiB"
                             ) from None
    return text


@contextmanager
def dask_client(settings: DaskSettings | None = None) -> Iterator[Client]:
    """A client for the given scheduler, or for a LocalCluster that lives as long as the block.

    A worker that dies (out of memory, most often) or a scheduler that goes away ends the
    block with one line saying what happened and what to change, never Dask's own message.
    """
    settings = settings or DaskSettings()
    _quiet_cluster_logs()
    try:
        if settings.scheduler:
            timeout = settings.timeout or CONNECT_TIMEOUT
            try:
                client = Client(settings.scheduler, timeout=timeout, set_as_default=False)
            except (OSError, TimeoutError, ValueError) as exc:
                reason = first_line(exc)
                raise CauselineError(
                    f"cannot reach the Dask scheduler at {settings.scheduler} "
                    f"within {timeout:g} s ({reason})"
                ) from None
            with client:
                yield client
            return
        with LocalCluster(
            n_workers=settings.workers, threads_per_worker=1, processes=settings.processes,
            memory_limit=settings.memory_limit, dashboard_address=":0",
        ) as cluster, Client(cluster, set_as_default=False) as client:
            yield client
    except CauselineError:
        raise
    except (KilledWorker, CommClosedError, CancelledError, TimeoutError) as exc:
        raise CauselineError(cluster_failure(exc, settings)) from None


def _quiet_cluster_logs() -> None:
    """Dask's own warnings (memory pauses, restarts, task tracebacks) only from errors up, in
    this process and in the local workers it starts (they read the variable at start): the
    run's own line says what failed. DASK_LOGGING__DISTRIBUTED set by the user wins."""
    os.environ.setdefault("DASK_LOGGING__DISTRIBUTED", "critical")
    level = os.environ["DASK_LOGGING__DISTRIBUTED"].upper()
    # Dask's configuration gives some loggers levels of their own (distributed.client, say).
    for name in ["distributed", *logging.root.manager.loggerDict]:
        if name == "distributed" or name.startswith("distributed."):
            logging.getLogger(name).setLevel(level)


def cluster_failure(exc: BaseException, settings: DaskSettings) -> str:
    """One line for a failure of the cluster itself, with what to change."""
    where = f"the Dask scheduler at {settings.scheduler}" if settings.scheduler \
        else "the local Dask cluster"
    if isinstance(exc, KilledWorker):
        memory = ("the memory per worker (--worker-memory, now "
                  f"{settings.memory_limit})" if not settings.scheduler
                  else "the memory per worker where the cluster is started")
        tries = int(dask.config.get("distributed.scheduler.allowed-failures", 3)) + 1
        times = "once" if tries == 1 else f"{tries} times"
        return (f"a Dask worker died while working on a partition ({times}), most "
                "likely out of memory: give smaller partitions (--partition-mb, now "
                f"{settings.partition_mb:g}) or raise {memory}")
    return (f"lost {where} while it was working: check that it is "
            "still running and reachable, then run again; nothing was written")


@lru_cache(maxsize=4)
def worker_explainer(bundle_path: str, top_k: int | None = None) -> Explainer:
    """The bundle at ``bundle_path``, loaded and verified once per worker process and kept."""
    return Explainer(load_bundle(Path(bundle_path)), top_k=top_k)


def stream_ordered(
    client: Client, tasks: list[Any], consume: Callable[[int, Any], None], ahead: int = AHEAD
) -> None:
    """Compute ``tasks`` on the cluster and hand results to ``consume`` in order, a few at once.

    Only ``ahead`` results exist at any time, so the client and the workers hold a bounded number
    of partitions however long the input is.
    """
    pending: deque[Any] = deque()
    position = 0
    for task in tasks:
        pending.append(client.compute(task))
        if len(pending) >= ahead:
            consume(position, _result(pending.popleft()))
            position += 1
    while pending:
        consume(position, _result(pending.popleft()))
        position += 1


def _result(future: Any) -> Any:
    try:
        return future.result()
    except (CauselineError, CommClosedError):
        raise
    except (ValueError, OSError) as exc:
        raise DataError(f"unreadable input partition: {first_line(exc)}") from None
    finally:
        future.release()
