"""The cause a failed job records for the exception that ended it (faults.failure_of): bad
input, an unreadable tile, exhausted resources, a cluster fault, an internal error."""

from __future__ import annotations

import errno
import sqlite3

import pytest
from distributed.client import FutureCancelledError
from distributed.scheduler import KilledWorker

from demaudit.service.run.cluster import ClusterUnavailableError
from demaudit.service.run.faults import (
    CLUSTER,
    INPUT,
    INTERNAL,
    INTERNAL_FAILURE,
    RESOURCES,
    TILE_UNREADABLE,
    failure_of,
)
from demaudit.workers.errors import (
    ImplausibleHeightsError,
    OutputError,
    SpecError,
    TileReadError,
)

DISK_FULL = "database or disk is full"  # SQLite's message for SQLITE_FULL (sqlite.org/rescode)


class Worker:
    address = "tcp://127.0.0.1:9"


@pytest.mark.parametrize(
    ("exc", "cause", "says"),
    [
        (SpecError("region file 'r.gpkg' has no CRS"), INPUT, "r.gpkg"),
        (TileReadError("test/t1.tif: not a raster"), TILE_UNREADABLE, "t1.tif"),
        (ImplausibleHeightsError("test/t2.tif: -9999 in 4 %"), TILE_UNREADABLE, "t2.tif"),
        (OSError(errno.ENOSPC, "No space left on device"), RESOURCES, "disk full"),
        (OutputError("cannot write x: No space left on device: /r/x"), RESOURCES, "/r/x"),
        (OutputError("--out: cannot write in /r (permission denied)"), INTERNAL, "/r"),
        (sqlite3.OperationalError(DISK_FULL), RESOURCES, DISK_FULL),
        (MemoryError(), RESOURCES, "memory"),
        (KilledWorker("audit-tile-a", Worker(), 3), RESOURCES, "memory"),
        (FutureCancelledError("k", "scheduler-connection-lost"), CLUSTER, "Dask"),
        (ClusterUnavailableError("no scheduler"), CLUSTER, "no scheduler"),
        (RuntimeError("a bug with /secret/path"), INTERNAL, INTERNAL_FAILURE),
    ],
)
def test_failure_causes(exc, cause, says):
    got_cause, message = failure_of(exc)
    assert got_cause == cause and says in message
    if cause == INTERNAL and not isinstance(exc, OutputError):
        assert "secret" not in message  # an internal error's details stay in the log
