"""The Dask client: an embedded LocalCluster by default, an external scheduler on request."""

from __future__ import annotations

import logging
from collections.abc import Iterator
from contextlib import contextmanager

from distributed import Client, LocalCluster

#: Each worker process runs one task at a time on one core: numpy's BLAS, OpenMP and GDAL stay on
#: that core too (more threads per process only oversubscribe the machine). GDAL's block cache
#: is bounded so that worker memory stays flat however many tiles pass through.
WORKER_ENV = {
    "OMP_NUM_THREADS": "1",
    "OPENBLAS_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
    "GDAL_NUM_THREADS": "1",
    "GDAL_CACHEMAX": "128",
}


@contextmanager
def dask_client(
    scheduler: str | None = None, *, workers: int = 2, memory_limit: str = "4GiB"
) -> Iterator[Client]:
    """A connected client; the local cluster (processes, one thread each, WORKER_ENV) lives as
    long as it."""
    if scheduler:
        with Client(scheduler, timeout="30s") as client:
            yield client
        return
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
        with Client(cluster) as client:
            yield client
    finally:
        cluster.close()
