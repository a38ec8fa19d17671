"""Where the Dask engine runs: a given scheduler, or a LocalCluster started for the run; results
streamed back in input order with a bounded number in flight; the bundle loaded once per worker.

Workers receive the bundle's *path*, never a model: each worker loads and verifies the bundle once
(:func:`worker_explainer`) and keeps it, so the path must be readable on every worker (a shared
volume). Without a scheduler address a :class:`~distributed.LocalCluster` is started for the run
and closed at its end.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from functools import lru_cache
from pathlib import Path
from typing import Any

from distributed import Client, LocalCluster

from causeline.service.bundle.load import load_bundle
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


@contextmanager
def dask_client(settings: DaskSettings | None = None) -> Iterator[Client]:
    """A client for the given scheduler, or for a LocalCluster that lives as long as the block."""
    settings = settings or DaskSettings()
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
    except CauselineError:
        raise
    except (ValueError, OSError) as exc:
        raise DataError(f"unreadable input partition: {first_line(exc)}") from None
    finally:
        future.release()
