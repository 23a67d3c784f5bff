"""Run tile tasks in order: in this process (one or more threads), on a local Dask
cluster, or on a scheduler.

One small runner shared by every job (tables, adjustment).  Results always come back in
task order, so outputs are identical whichever way they were computed.  At most
``4 x workers`` tasks are in flight (workers keep busy while the job writes results),
so memory stays bounded by the tile size.

:func:`connect_workers` starts the local cluster (or connects to the scheduler) in a
background thread and warms every worker up (imports of the tile code), so a job can
read its inputs and build its mesh meanwhile; the job then passes the connection to
:func:`run_ordered` for each of its passes.
"""

from __future__ import annotations

import functools
import logging
import multiprocessing
import os
import re
import threading
from collections import deque
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from concurrent.futures import TimeoutError as FutureTimeout
from typing import Any

from .errors import InputError
from .memory import keep_freed_memory
from .progress import track

log = logging.getLogger(__name__)

SCHEDULER_TIMEOUT = "10s"
#: most tile threads a job starts by itself (each one adds a tile's working set)
DEFAULT_THREADS_MAX = 4


def default_threads() -> int:
    """Tile threads when none are asked for: one per core this process may use, up to
    :data:`DEFAULT_THREADS_MAX`."""
    try:
        cores = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):  # not on Linux
        cores = os.cpu_count() or 1
    return max(1, min(cores, DEFAULT_THREADS_MAX))


def local_cluster_note(workers: int) -> str | None:
    """A note when a local cluster of ``workers`` is no larger than the tile threads one
    process runs here by itself (:func:`default_threads`), else None.

    Such a cluster computes on the same cores as one process and adds the workers'
    start-up and the transfer of every tile's rows, so it is usually the slower choice.
    """
    threads = default_threads()
    if int(workers) > threads:
        return None
    return (f"a local cluster of {int(workers)} worker(s) is usually slower than one process "
            f"here, which runs {threads} tile thread(s) by itself; workers pay off beyond "
            "the cores one process uses (more cores, or an existing scheduler on several "
            "machines)")


def check_where(workers: int | None, scheduler: str | None, threads: int | None = None) -> None:
    """Raise InputError unless workers / scheduler / threads make one valid choice."""
    if workers is not None and scheduler is not None:
        raise InputError("give either workers or a scheduler address, not both")
    if workers is not None and int(workers) < 1:
        raise InputError(f"workers must be 1 or more, got {workers}")
    if threads is not None and int(threads) < 1:
        raise InputError(f"threads must be 1 or more, got {threads}")
    if threads is not None and int(threads) > 1 and (workers is not None or scheduler is not None):
        raise InputError(
            "threads run tiles in this process; give either threads or workers / a scheduler"
        )
    if scheduler is not None and _SCHEDULER_ADDRESS.fullmatch(str(scheduler).strip()) is None:
        raise InputError(
            f"scheduler address {scheduler!r} is not a Dask scheduler's address; give "
            "tcp://HOST:PORT (the scheduler's port, usually 8786, not its dashboard's)"
        )


#: a Dask scheduler's address: an optional comm scheme, a host (or [IPv6]) and a port;
#: or a scheduler in this process (``inproc://``)
_SCHEDULER_ADDRESS = re.compile(
    r"(?:(?:tcp|tls|ws|wss|ucx)://)?(?:\[[0-9A-Fa-f:.]+\]|[^\s:/\[\]]+):\d{1,5}|inproc://\S+")
#: seconds to wait for an existing scheduler to answer before giving up (the client's
#: own connect timeout does not cover a server that accepts and then says nothing)
SCHEDULER_WAIT_SECONDS = 60.0


def _warm_worker() -> None:
    """Import the tile code (and its compiled kernels) once per worker process."""
    from . import _kernels, engine  # noqa: F401


def _preload_forkserver() -> None:
    """Make local workers fork from one process that has loaded the tile code once.

    Dask gives the forkserver its own preload list the first time it makes its
    multiprocessing context, replacing any set before; so that context is made first and
    the tile code added to its list.  Without it every worker imports the libraries and
    loads the compiled kernels itself (about a second of CPU each).  It has no effect once
    this process's forkserver runs (a cluster started before in the same process).
    """
    from multiprocessing import forkserver

    from distributed.utils import get_mp_context

    context = get_mp_context()
    server = getattr(forkserver, "_forkserver", None)
    preload = list(getattr(server, "_preload_modules", None) or ["distributed"])
    if "ntrans._worker_preload" not in preload:
        context.set_forkserver_preload([*preload, "ntrans._worker_preload"])


def _connect(workers: int | None, scheduler: str | None) -> tuple[Any, Any]:
    try:
        from distributed import Client, LocalCluster
    except ImportError as exc:  # pragma: no cover - dask is a test dependency
        raise InputError(
            "running on workers needs dask.distributed; install ntrans[cluster] or drop --workers"
        ) from exc
    cluster = None
    if scheduler is not None:
        try:
            client = Client(scheduler, timeout=SCHEDULER_TIMEOUT)
        except Exception as exc:  # refused, timed out, or something else answered there
            raise InputError(
                f"no Dask scheduler answered at {scheduler} ({type(exc).__name__}); check the "
                "address (the scheduler's port, not its dashboard's) or drop --scheduler"
            ) from exc
    else:
        import dask

        # Dask sets MALLOC_TRIM_THRESHOLD_ for its workers by default; with it, glibc maps
        # and unmaps every large array afresh, and the tile arithmetic here (many large
        # temporaries) then takes about twice the CPU time it takes in one process
        config = {
            "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_": None,
            # the workers' statistical profiler samples every thread's stack 100 times
            # a second (for the dashboard); on tiles it costs CPU time and holds the GIL
            "distributed.worker.profile.enabled": False,
            # every scheduler, nanny and worker event loop checks its own delay every
            # 20 ms and samples the system for the dashboard every 0.5 s: idle, a local
            # 2-worker cluster spent 0.6 CPU-s per 7 s on that, 0.23 with these (the
            # memory monitor that pauses or restarts workers keeps its own interval)
            "distributed.admin.tick.interval": "1s",
            "distributed.admin.system-monitor.interval": "5s",
        }
        method = dask.config.get("distributed.worker.multiprocessing-method")
        if method == "spawn" and "forkserver" in multiprocessing.get_all_start_methods():
            config["distributed.worker.multiprocessing-method"] = "forkserver"
        with dask.config.set(config):
            if dask.config.get("distributed.worker.multiprocessing-method") == "forkserver":
                _preload_forkserver()
            try:
                cluster = LocalCluster(
                    n_workers=int(workers),
                    threads_per_worker=1,
                    processes=True,
                    dashboard_address=":0",
                    silence_logs=logging.WARNING,
                )
            except RuntimeError as exc:  # a worker process did not start
                raise InputError(
                    f"the local Dask workers did not start ({exc}); from a Python script, "
                    "call ntrans under if __name__ == '__main__': (new worker processes "
                    "import the script), or drop the workers"
                ) from exc
        client = Client(cluster)
    try:
        client.run(_warm_worker)
    except Exception:
        client.close()
        if cluster is not None:
            cluster.close()
        raise
    return client, cluster


class WorkerConnection:
    """A Dask client being connected in the background; close it when the job ends."""

    def __init__(self, workers: int | None, scheduler: str | None) -> None:
        check_where(workers, scheduler)
        self.local = scheduler is None  # workers on this machine: they see its files
        note = local_cluster_note(workers) if workers is not None else None
        if note is not None:
            log.info(note)
        self._pool = ThreadPoolExecutor(1, thread_name_prefix="ntrans-workers")
        self._scheduler = scheduler
        # the connection is made in a daemon thread of its own: a scheduler that never
        # answers must not keep the job (or its interruption) waiting
        self._future: Future[Any] = Future()
        threading.Thread(target=self._connect, args=(workers, scheduler),
                         name="ntrans-connect", daemon=True).start()
        self._closing: Any = None

    def _connect(self, workers: int | None, scheduler: str | None) -> None:
        if not self._future.set_running_or_notify_cancel():  # pragma: no cover
            return
        try:
            self._future.set_result(_connect(workers, scheduler))
        except BaseException as exc:
            self._future.set_exception(exc)

    def ready(self) -> bool:
        """True once the workers are up and warm (never waits)."""
        return self._future.done()

    def n_workers(self) -> int:
        """Workers the scheduler knows of now (at least 1; waits for the start-up)."""
        return _n_workers(self.client)

    @property
    def client(self) -> Any:
        """The connected client (waits for the start-up to finish; for an existing
        scheduler at most :data:`SCHEDULER_WAIT_SECONDS`)."""
        wait = None if self.local else SCHEDULER_WAIT_SECONDS
        try:
            return self._future.result(timeout=wait)[0]
        except FutureTimeout:
            raise InputError(
                f"the Dask scheduler at {self._scheduler} did not answer within "
                f"{wait:g} s; check the address (the scheduler's port, not its dashboard's) "
                "or drop --scheduler"
            ) from None

    def release(self) -> None:
        """Start closing the client and local cluster in the background (no waiting).

        Call it when no more tiles will be submitted; the job can then write its last
        files while the workers shut down.
        """
        if self._closing is None:
            self._closing = self._pool.submit(self._shut_down)

    def _shut_down(self) -> None:
        if not self._future.done() and not self.local:
            return  # a scheduler that never answered: nothing to close, nothing to wait for
        if self._future.exception() is None:
            client, cluster = self._future.result()
            client.close()
            if cluster is not None:
                cluster.close()

    def close(self) -> None:
        """Close the client and the local cluster, if one was started, and wait for it."""
        try:
            self.release()
            self._closing.result()
        finally:
            self._pool.shutdown(wait=True)

    def __enter__(self) -> WorkerConnection:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def connect_workers(workers: int | None, scheduler: str | None) -> WorkerConnection | None:
    """Start connecting to workers in the background, or None to run in this process."""
    if workers is None and scheduler is None:
        return None
    return WorkerConnection(workers, scheduler)


def call(fn: Callable[[Any], Any], task: Any) -> Any:
    """``fn(task)``: lets :func:`run_ordered` map a plain one-argument function."""
    return fn(task)


def run_ordered(
    fn: Callable[..., Any],
    shared: Any,
    tasks: Iterable[Any],
    *,
    workers: int | None = None,
    scheduler: str | None = None,
    connection: WorkerConnection | None = None,
    progress: bool = False,
    total: int | None = None,
    desc: str = "tiles",
    max_in_flight: int | None = None,
    threads: int | None = None,
) -> Iterator[Any]:
    """Yield ``fn(shared, task)`` for every task, in task order.

    Parameters
    ----------
    fn
        A module-level function (picklable for Dask workers).
    shared
        Read-only data every task needs; sent to each worker once.
    workers
        Start a local cluster of this many single-threaded processes (closed at the end).
    scheduler
        Address of an existing Dask scheduler (all workers must see the input paths).
    connection
        An open :class:`WorkerConnection` to use instead (left open at the end).
    threads
        In this process: run this many tasks at once in a thread pool (``fn`` must be
        thread-safe; the tile code is, its kernels release the GIL).  Default: one per
        core, up to four (:func:`default_threads`); 1 runs them one after another in
        the calling thread.
    """
    check_where(workers, scheduler, threads)
    if connection is not None and (workers is not None or scheduler is not None):
        raise InputError("give either a worker connection or workers / a scheduler, not both")
    if connection is not None:
        results: Iterator[Any] = _run_dask(fn, shared, tasks, connection.client, max_in_flight)
    elif workers is None and scheduler is None:
        keep_freed_memory()  # tasks free and allocate arrays of similar sizes
        n_threads = default_threads() if threads is None else int(threads)
        if n_threads > 1:
            results = _run_threads(fn, shared, tasks, n_threads, max_in_flight)
        else:
            results = (fn(shared, task) for task in tasks)
    else:
        results = _run_own_connection(fn, shared, tasks, workers, scheduler, max_in_flight)
    yield from track(results, total=total, desc=desc, enabled=progress)


def _run_threads(fn, shared, tasks, threads: int, max_in_flight: int | None) -> Iterator[Any]:
    """``fn(shared, task)`` on a pool of ``threads`` threads, yielded in task order.

    At most ``max_in_flight`` (default 2 x threads) tasks are submitted and not yet
    yielded, so memory stays bounded by a few tiles.  On an error or an early stop the
    tasks not yet started are cancelled and the running ones finish before this returns.
    """
    with ThreadPoolExecutor(threads, thread_name_prefix="ntrans-tiles") as pool:
        yield from _in_order(lambda task: pool.submit(fn, shared, task), tasks,
                             max_in_flight or 2 * threads)


def _run_own_connection(fn, shared, tasks, workers, scheduler, max_in_flight) -> Iterator[Any]:
    with WorkerConnection(workers, scheduler) as connection:
        yield from _run_dask(fn, shared, tasks, connection.client, max_in_flight)


def _n_workers(client: Any) -> int:
    """Workers a Dask client's scheduler knows of now (at least 1)."""
    return max(len(client.scheduler_info().get("workers", {})), 1)


def _run_dask(fn, shared, tasks, client, max_in_flight) -> Iterator[Any]:
    n_workers = _n_workers(client)
    limit = max_in_flight or 4 * n_workers
    log.info("running tiles on %d Dask worker(s)", n_workers)
    # the partial holds the only reference to the scattered data: released with it.  A
    # fresh key every time (hash=False): a tuple is scattered item by item, and with
    # content keys a pass sharing an item with the previous pass (adjust's job) got the
    # same key, which the previous pass's release could then remove under it; its tasks
    # failed with "lost dependencies" (about one run in three of a two-pass test)
    submit = functools.partial(client.submit, fn,
                               client.scatter(shared, broadcast=True, hash=False), pure=False)
    try:
        yield from _in_order(submit, tasks, limit)
    finally:
        del submit


def _in_order(submit: Callable[[Any], Any], tasks: Iterable[Any], limit: int) -> Iterator[Any]:
    """Results of ``submit(task)`` futures in task order, at most ``limit`` not yet taken.

    On an error or an early stop the futures not yet taken are cancelled.
    """
    pending: deque = deque()
    try:
        for task in tasks:
            pending.append(submit(task))
            if len(pending) >= limit:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()
    finally:
        for future in pending:
            future.cancel()
