"""The Dask client: an embedded LocalCluster by default, an external scheduler on request.

The REST service holds a :class:`ClusterConnection` (the shared client, made anew after a
scheduler outage) and gives each job a :class:`JobClient` (which remembers the job's futures,
so that a stalled or lost job can be told and stopped).
"""

from __future__ import annotations

import logging
import math
import threading
import time
import weakref
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any

import dask
from distributed import Client, LocalCluster

from demaudit.service.run.allocator import MMAP_THRESHOLD, TRIM_THRESHOLD, tune_allocator

#: HOUSEKEEPING: Dask's own periodic work, slowed down. Every scheduler, nanny and worker
#: wakes its event loop every 20 ms to time it (a warning when it was blocked for seconds),
#: samples the machine every 0.5 s for dashboards, and each nanny and worker reads the worker's
#: memory every 0.1 s. Idle, the embedded cluster spent 98 ms of CPU a second on this (2
#: workers; 19-21 with these settings: what a service waiting for jobs burns), and while tiles
#: run each wake-up takes the GIL from the tile's thread (a 256-tile job's worker context
#: switches about a quarter fewer; its run time unchanged within this machine's noise in two
#: series of interleaved jobs: benchmarks/RESULTS.md, issue 13). Blocked loops are still
#: reported (the limit is 3 s), and a worker's memory is still checked twice a second.
HOUSEKEEPING = {
    "distributed.admin.tick.interval": "500ms",
    "distributed.admin.system-monitor.interval": "2s",
    "distributed.worker.memory.monitor-interval": "500ms",
}


def dask_env(config: dict[str, str]) -> dict[str, str]:
    """Dask configuration as the environment variables dask reads at import (for processes
    started from the command line: `dask worker`, `dask scheduler`)."""
    return {
        "DASK_" + key.upper().replace(".", "__").replace("-", "_"): value
        for key, value in config.items()
    }


#: Each worker process runs one task at a time on one core: numpy's BLAS, OpenMP and GDAL stay on
#: that core too (more threads per process only oversubscribe the machine). GDAL's block cache
#: is bounded so that worker memory stays flat however many tiles pass through.
#: MALLOC_MMAP_THRESHOLD_: Dask starts workers with MALLOC_TRIM_THRESHOLD_ set, which switches
#: off glibc's adaptive mmap threshold, so every tile-sized array became a fresh mmap whose pages
#: the kernel faults in and zeroes again (measured: about 40 % more CPU per tile). Arrays up to
#: 32 MiB (a 2000 x 2000 float64 tile) now come from the heap and are reused from tile to tile.
#: MALLOC_TRIM_THRESHOLD_: Dask's 64 KiB handed the top of the heap back to the kernel whenever
#: that much was free, so arrays made and dropped again were faulted in anew all the same. With
#: 64 MiB (256 kept no more): a 256-tile job's worker page faults 227,000 -> 155,000, peak RSS
#: +2 % (worker CPU lower in two interleaved pairs of three: within this machine's noise);
#: allocator.py sets the same for the client. glibc reads both at process start only: see
#: dask_client (and the deploy manifests).
#: DASK_DISTRIBUTED__WORKER__PROFILE__ENABLED: the worker's sampling profiler (it walks the task
#: thread's stack every 10 ms, for a dashboard demaudit does not serve) costs about 5 % of the
#: tile phase (benchmarks/RESULTS.md, issue 13). For `dask worker` processes (deploy manifests)
#: the variable does it; the embedded cluster's nannies hand the client's configuration to their
#: workers, so dask_client sets it there.
WORKER_ENV = {
    "OMP_NUM_THREADS": "1",
    "OPENBLAS_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
    "GDAL_NUM_THREADS": "1",
    "GDAL_CACHEMAX": "128",
    "MALLOC_MMAP_THRESHOLD_": str(MMAP_THRESHOLD),  # 33554432: the manifests spell it out
    "MALLOC_TRIM_THRESHOLD_": str(TRIM_THRESHOLD),  # 67108864
    "DASK_DISTRIBUTED__WORKER__PROFILE__ENABLED": "False",
    **dask_env(HOUSEKEEPING),
}
#: A `dask scheduler` process of a deployment (deploy manifests): its housekeeping too.
SCHEDULER_ENV = dask_env(
    {k: v for k, v in HOUSEKEEPING.items() if not k.startswith("distributed.worker.")}
)
#: The part of WORKER_ENV that must be in the environment before the worker process starts.
PRE_SPAWN_ENV = ("MALLOC_MMAP_THRESHOLD_", "MALLOC_TRIM_THRESHOLD_")

log = logging.getLogger("demaudit.cluster")


@contextmanager
def dask_client(
    scheduler: str | None = None, *, workers: int = 2, memory_limit: str = "4GiB"
) -> Iterator[Client]:
    """A connected client; the local cluster (processes, one thread each, WORKER_ENV) lives as
    long as it. This process's allocator is tuned for the results it gathers (allocator.py)."""
    tune_allocator()
    if scheduler:
        with Client(scheduler, timeout="30s") as client:
            yield client
        return
    early: dict[str, object] = {
        f"distributed.nanny.pre-spawn-environ.{k}": WORKER_ENV[k] for k in PRE_SPAWN_ENV
    }
    early["distributed.worker.profile.enabled"] = False
    early.update(HOUSEKEEPING)  # for the scheduler and nannies here, and their workers
    with dask.config.set(early):  # the nanny sets these before it starts the worker process
        cluster = LocalCluster(
            n_workers=workers,
            threads_per_worker=1,
            processes=True,
            memory_limit=memory_limit,
            dashboard_address=None,
            silence_logs=logging.ERROR,
            env=WORKER_ENV,
        )
    try:
        # results are fetched from the workers themselves, not relayed through the scheduler:
        # the scheduler shares this process, so relaying cost it a second receive and send
        # of every tile's result (about 10 % of a same-grid audit's time, issue 13)
        with Client(cluster, direct_to_workers=True) as client:
            yield client
    finally:
        cluster.close()


class ClusterUnavailableError(RuntimeError):
    """The Dask scheduler does not answer: new jobs are refused until it does again."""


#: Client states from which distributed reconnects by itself (within the client's timeout).
_RECOVERING = frozenset({"newly-created", "connecting"})


class ClusterConnection:
    """The shared Dask client, made anew when the old one gave up on a lost scheduler.

    distributed.Client retries a lost scheduler for its own timeout, then closes for good
    (every later submission fails). :meth:`ensure` replaces a closed client by a new one to the
    same address (``connect``), at most once every ``retry_s`` seconds; :meth:`watch` does so
    from a background thread. Without ``connect`` (a client made elsewhere, e.g. a test's) the
    client is kept as it is. ``status`` and ``nthreads`` answer for the current client, so the
    connection stands in for it in the health probes.
    """

    def __init__(
        self,
        client: Any,
        *,
        connect: Callable[[], Any] | None = None,
        address: str | None = None,
        retry_s: float = 2.0,
    ) -> None:
        self._client = client
        self._connect = connect
        self.address = address
        self._retry_s = retry_s
        self._lock = threading.Lock()
        self._last_try = -math.inf
        self._stop = threading.Event()
        self._watcher: threading.Thread | None = None
        self.reconnections = 0

    @property
    def client(self) -> Any:
        """The current client."""
        return self._client

    @property
    def status(self) -> str:
        """The current client's status (``running`` when it can take work)."""
        return str(getattr(self._client, "status", "running"))

    def nthreads(self) -> Any:
        """Threads per connected worker (the current client's answer)."""
        return self._client.nthreads()

    def available(self) -> bool:
        """Whether the client is connected to a scheduler now (a closed one is replaced
        first, when it may be)."""
        return self.ensure()

    def ensure(self) -> bool:
        """Replace a closed client by a new one (when a connect function is known and the last
        try is retry_s old); whether a connected client is there afterwards."""
        client = self._client
        status = str(getattr(client, "status", "running"))
        if status == "running":
            return True
        if status in _RECOVERING or self._connect is None:
            return False
        if not self._lock.acquire(blocking=False):
            return False  # another thread is connecting: do not wait for it
        try:
            if self._client is not client:
                return self.status == "running"
            now = time.monotonic()
            if now - self._last_try < self._retry_s:
                return False
            self._last_try = now
            try:
                fresh = self._connect()
            except Exception as exc:  # noqa: BLE001 - retried later; the probes report it
                log.warning("the Dask scheduler %s still does not answer: %s", self.address, exc)
                return False
            self._client = fresh
            self.reconnections += 1
        finally:
            self._lock.release()
        log.warning("connected anew to the Dask scheduler %s", self.address)
        _close_quietly(client)
        return True

    def watch(self, interval_s: float = 2.0) -> None:
        """Check (and replace) the client every interval_s seconds on a daemon thread."""
        if self._connect is None or self._watcher is not None:
            return

        def loop() -> None:
            while not self._stop.wait(interval_s):
                self.ensure()

        self._watcher = threading.Thread(target=loop, name="demaudit-cluster", daemon=True)
        self._watcher.start()

    def close(self) -> None:
        """Stop watching; close the client when this connection made it."""
        self._stop.set()
        if self._watcher is not None:
            self._watcher.join(timeout=10)
        if self._connect is not None:
            _close_quietly(self._client)


def _close_quietly(client: Any) -> None:
    try:
        client.close(timeout=5)
    except Exception:  # noqa: BLE001 - the client is being dropped anyway
        log.debug("closing a dropped Dask client failed", exc_info=True)


@contextmanager
def cluster_connection(
    scheduler: str | None = None,
    *,
    workers: int = 2,
    memory_limit: str = "4GiB",
    timeout_s: float = 30.0,
) -> Iterator[ClusterConnection]:
    """A watched connection to the external scheduler (each client waits up to timeout_s for
    it, at first and after losing it), or to an embedded local cluster (as dask_client). This
    process's allocator is tuned for the results it gathers (allocator.py)."""
    tune_allocator()
    if not scheduler:
        with dask_client(None, workers=workers, memory_limit=memory_limit) as client:
            yield ClusterConnection(client)
        return

    def connect() -> Client:
        return Client(scheduler, timeout=f"{timeout_s}s")

    connection = ClusterConnection(connect(), connect=connect, address=scheduler)
    connection.watch()
    try:
        yield connection
    finally:
        connection.close()


class JobClient:
    """One job's view of the shared client: the futures the job submits are remembered (weakly),
    so that the dispatcher can tell when the job last made progress, whether the cluster
    dropped its tasks (a lost scheduler cancels every future), and cancel them all.

    Everything else is passed to the client.
    """

    def __init__(self, client: Any) -> None:
        self._client = client
        self._futures: weakref.WeakSet[Any] = weakref.WeakSet()
        self._lock = threading.Lock()
        self._pending: set[Any] = set()
        self._dropped: set[str] = set()
        self.last_progress = time.monotonic()
        self.cancelled_by_us = False

    def submit(self, *args: Any, **kwargs: Any) -> Any:
        future = self._client.submit(*args, **kwargs)
        self._track([future])
        return future

    def map(self, *args: Any, **kwargs: Any) -> Any:
        futures = self._client.map(*args, **kwargs)
        self._track(futures)
        return futures

    def cancel(self, futures: Any, *args: Any, **kwargs: Any) -> Any:
        if self.cancelled_by_us or self.lost():
            return None  # already cancelled (by the dispatcher, or by the lost connection)
        self.cancelled_by_us = True
        return self._client.cancel(futures, *args, **kwargs)

    def cancel_tasks(self, futures: Any) -> None:
        """Cancel some of the job's tasks on purpose (tiles past their time limit): not taken
        for a lost cluster, and the job can still cancel the others."""
        with self._lock:
            self._dropped.update(str(f.key) for f in futures)
        self._client.cancel(futures)

    def __getattr__(self, name: str) -> Any:
        return getattr(self._client, name)

    def _track(self, futures: Any) -> None:
        with self._lock:
            for future in futures:
                self._futures.add(future)

    def _live(self) -> list[Any]:
        with self._lock:
            return list(self._futures)

    def lost(self) -> bool:
        """Whether a future of the job was cancelled by someone else than the job (the client
        cancels all when it loses the scheduler)."""
        if self.cancelled_by_us:
            return False
        return any(
            getattr(f, "status", None) == "cancelled"
            and not getattr(f, "_cleared", False)
            and str(f.key) not in self._dropped
            for f in self._live()
        )  # a future the job released (Future.release) also reads "cancelled": not lost

    def stalled_for(self) -> float:
        """Seconds since a task of the job last finished, while some are waiting (0 when none
        waits)."""
        now = time.monotonic()
        waiting = {f.key for f in self._live() if not f.done()}
        if not waiting or self._pending - waiting:
            self.last_progress = now  # nothing waits, or something finished since last look
        self._pending = waiting
        return now - self.last_progress

    def busy(self) -> bool:
        """Whether a worker is running one of the job's waiting tasks now (asks the
        scheduler)."""
        processing = self._client.processing()
        running = {key for keys in processing.values() for key in keys}
        return bool(running & self._pending)

    def cancel_all(self) -> None:
        """Cancel every task of the job still on the cluster."""
        self.cancelled_by_us = True
        futures = [f for f in self._live() if not f.done()]
        if futures:
            self._client.cancel(futures)
