"""Run tile tasks in order: in this process, on a local Dask cluster, or on a scheduler.

One small runner shared by every job (tables, adjustment).  Results always come back in
task order, so outputs are identical whichever way they were computed.  At most
``2 x workers`` tasks are in flight, so memory stays bounded by the tile size.
"""

from __future__ import annotations

import logging
from collections import deque
from collections.abc import Callable, Iterable, Iterator
from typing import Any

from .errors import InputError
from .progress import track

log = logging.getLogger(__name__)

SCHEDULER_TIMEOUT = "10s"


def run_ordered(
    fn: Callable[..., Any],
    shared: Any,
    tasks: Iterable[Any],
    *,
    workers: int | None = None,
    scheduler: str | None = None,
    progress: bool = False,
    total: int | None = None,
    desc: str = "tiles",
    max_in_flight: int | None = None,
) -> Iterator[Any]:
    """Yield ``fn(shared, task)`` for every task, in task order.

    Parameters
    ----------
    fn
        A module-level function (picklable for Dask workers).
    shared
        Read-only data every task needs; sent to each worker once.
    workers
        Start a local cluster of this many single-threaded processes.
    scheduler
        Address of an existing Dask scheduler (all workers must see the input paths).
    """
    if workers is not None and scheduler is not None:
        raise InputError("give either workers or a scheduler address, not both")
    if workers is not None and int(workers) < 1:
        raise InputError(f"workers must be 1 or more, got {workers}")
    if workers is None and scheduler is None:
        results: Iterator[Any] = (fn(shared, task) for task in tasks)
    else:
        results = _run_dask(fn, shared, tasks, workers, scheduler, max_in_flight)
    yield from track(results, total=total, desc=desc, enabled=progress)


def _run_dask(fn, shared, tasks, workers, scheduler, max_in_flight) -> Iterator[Any]:
    try:
        from distributed import Client, LocalCluster
    except ImportError as exc:  # pragma: no cover - dask is a test dependency
        raise InputError(
            "running on workers needs dask.distributed; install ntrans[cluster] or drop --workers"
        ) from exc

    cluster = None
    try:
        if scheduler is not None:
            try:
                client = Client(scheduler, timeout=SCHEDULER_TIMEOUT)
            except OSError as exc:
                raise InputError(
                    f"no Dask scheduler answered at {scheduler}; check the address or drop --scheduler"
                ) from exc
        else:
            cluster = LocalCluster(
                n_workers=int(workers),
                threads_per_worker=1,
                processes=True,
                dashboard_address=":0",
                silence_logs=logging.WARNING,
            )
            client = Client(cluster)
        try:
            n_workers = max(len(client.scheduler_info().get("workers", {})), 1)
            limit = max_in_flight or 2 * n_workers
            log.info("running tiles on %d Dask worker(s)", n_workers)
            shared_future = client.scatter(shared, broadcast=True)
            pending: deque = deque()
            for task in tasks:
                pending.append(client.submit(fn, shared_future, task, pure=False))
                if len(pending) >= limit:
                    yield pending.popleft().result()
            while pending:
                yield pending.popleft().result()
        finally:
            client.close()
    finally:
        if cluster is not None:
            cluster.close()
