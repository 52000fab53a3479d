"""JobClient on a real local Dask cluster: a future the job itself released is not a lost
connection; one the cluster cancelled is."""

from __future__ import annotations

import time

from demaudit.service.run.cluster import JobClient


def _double(x: int) -> int:
    return 2 * x


def _sleep(seconds: float) -> float:
    time.sleep(seconds)
    return seconds


def test_released_futures_do_not_read_as_a_lost_scheduler(dask_client):
    job = JobClient(dask_client)
    futures = [job.submit(_double, i, pure=False) for i in range(3)]
    for future in futures:
        assert future.result() in (0, 2, 4)
        future.release()  # as the runner does after folding each tile
    deadline = time.monotonic() + 10  # distributed marks a released future "cancelled" ...
    while any(f.status != "cancelled" for f in futures) and time.monotonic() < deadline:
        time.sleep(0.05)
    assert [f.status for f in futures] == ["cancelled"] * 3  # ... which is no lost connection
    assert not job.lost()


def test_futures_cancelled_by_the_cluster_read_as_lost(dask_client):
    job = JobClient(dask_client)
    future = job.submit(_sleep, 30, pure=False)
    dask_client.cancel([future])  # what a lost scheduler does to every future
    deadline = time.monotonic() + 10
    while future.status != "cancelled" and time.monotonic() < deadline:
        time.sleep(0.05)
    assert job.lost()
