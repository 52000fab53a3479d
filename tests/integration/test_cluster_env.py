"""The embedded cluster's workers run single-threaded numeric and GDAL code (service/cluster.py)."""

from __future__ import annotations

import os

from service.cluster import WORKER_ENV


def _worker_env() -> dict[str, str | None]:
    return {name: os.environ.get(name) for name in WORKER_ENV}


def test_every_worker_has_the_worker_env(dask_client) -> None:
    seen = dask_client.run(_worker_env)
    assert len(seen) == 2
    for env in seen.values():
        assert env == WORKER_ENV
