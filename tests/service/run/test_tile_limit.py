"""The tile time limit: only running time counts, a task past the limit is cancelled with a
clear reason and its worker restarted; queued tasks are never cancelled (stand-in client, then
the session's real LocalCluster)."""

from __future__ import annotations

import time
from typing import Any

from distributed import as_completed

from demaudit.service.run.cluster import JobClient
from demaudit.service.run.tile_limit import TileClock, poll_interval, timeout_reason
from demaudit.service.run.tile_tasks import TileTasks, tiles_of_key
from demaudit.workers.tile.task import FAILED


class Pending:
    """A Dask future stand-in."""

    def __init__(self, key: str) -> None:
        self.key = key
        self.status = "pending"
        self._cleared = False

    def done(self) -> bool:
        return self.status != "pending"


class Scheduler:
    """A client stand-in: the scheduler's running tasks are set by the test."""

    def __init__(self, running: dict[str, tuple[str, float]]) -> None:
        self.running = running
        self.cancelled: list[str] = []
        self.restarted: list[list[str]] = []

    def run_on_scheduler(self, function: Any) -> dict[str, tuple[str, float]]:
        return dict(self.running)

    def cancel(self, futures: list[Pending]) -> None:
        for future in futures:
            future.status = "cancelled"
            self.cancelled.append(future.key)

    def restart_workers(self, workers: list[str], timeout: float) -> None:
        self.restarted.append(workers)


def test_the_reason_names_the_tile_and_the_limit():
    assert timeout_reason("t_0_1", 1800.0) == "tile t_0_1 did not finish within 1800 s; cancelled"
    assert tiles_of_key("audit-tile-t_0_1-abc123") == ["t_0_1"]
    assert poll_interval(1800.0) == 10.0 and poll_interval(1.0) == 0.2


def test_only_tasks_running_past_the_limit_are_cancelled_and_their_worker_restarted():
    futures = [Pending(f"audit-tile-t{i}-r") for i in range(4)]
    client = Scheduler(
        {
            "audit-tile-t0-r": ("tcp://a:1", 12.0),  # running past the limit
            "audit-tile-t1-r": ("tcp://b:1", 9.0),  # running, within it
            "audit-tile-other-job": ("tcp://b:1", 99.0),  # not this job's
        }
    )  # t2 and t3 wait in a queue: they have no running time
    clock = TileClock(client, futures, 10.0, tiles_of=tiles_of_key)
    assert clock.check() == ["audit-tile-t0-r"]
    assert client.cancelled == ["audit-tile-t0-r"] and client.restarted == [["tcp://a:1"]]
    assert clock.reason("audit-tile-t0-r") == timeout_reason("t0", 10.0)
    assert all(clock.reason(f.key) is None for f in futures[1:])
    client.running["audit-tile-t0-r"] = ("tcp://a:1", 30.0)  # cancelled once, not again
    assert clock.check() == [] and client.cancelled == ["audit-tile-t0-r"]


def test_a_task_of_several_tiles_has_the_limit_once_per_tile():
    futures = [Pending("audit-tile-a|b|c-r"), Pending("audit-tile-d-r")]
    client = Scheduler(
        {"audit-tile-a|b|c-r": ("tcp://a:1", 25.0), "audit-tile-d-r": ("tcp://a:1", 9.0)}
    )
    clock = TileClock(client, futures, 10.0, tiles_of=tiles_of_key)
    assert clock.check() == []  # 25 s for three tiles: within 3 x 10 s
    client.running["audit-tile-a|b|c-r"] = ("tcp://a:1", 31.0)
    assert clock.check() == ["audit-tile-a|b|c-r"]
    assert clock.reason("audit-tile-a|b|c-r") == timeout_reason("a, b, c", 30.0)
    later = Pending("audit-tile-e-r")
    clock.watch([later])  # tasks submitted after the clock started are watched too
    client.running["audit-tile-e-r"] = ("tcp://b:1", 11.0)
    assert clock.check() == ["audit-tile-e-r"] and client.restarted[-1] == ["tcp://b:1"]


def test_a_timed_out_tile_is_failed_with_the_reason():
    tasks = TileTasks(lambda *a, **k: Pending(k["key"]), run_id="r", per_task=1)
    tasks._tiles["audit-tile-t_2_0-r"] = ("t_2_0",)
    [result] = tasks.results(Pending("audit-tile-t_2_0-r"), timeout_reason("t_2_0", 5.0))  # type: ignore[arg-type]
    assert (result.tile_id, result.status) == ("t_2_0", FAILED)
    assert result.reason == "tile t_2_0 did not finish within 5 s; cancelled"


def test_a_job_client_does_not_take_a_timed_out_task_for_a_lost_cluster():
    inner = Scheduler({})
    client = JobClient(inner)
    futures = [Pending("audit-tile-a-r"), Pending("audit-tile-b-r")]
    client._track(futures)
    client.cancel_tasks(futures[:1])
    assert inner.cancelled == ["audit-tile-a-r"] and not client.lost()
    inner.cancel(futures[1:])  # as a lost scheduler cancels every future
    assert client.lost()


def _run(client: Any, futures: list[Any], limit_s: float) -> tuple[dict[str, str], set[str]]:
    """Wait for every future under a TileClock: (key -> reason of the cancelled ones, keys of
    the finished ones)."""
    cancelled: dict[str, str] = {}
    finished: set[str] = set()
    with TileClock(client, futures, limit_s, tiles_of=tiles_of_key) as clock:
        for future in as_completed(futures):
            reason = clock.reason(future.key)
            if reason is not None:
                cancelled[future.key] = reason
            elif future.status == "finished":
                finished.add(future.key)
    return cancelled, finished


def test_a_hung_task_on_a_real_cluster_is_cancelled_and_the_others_finish(dask_client: Any):
    client: Any = JobClient(dask_client)  # as the service runs a job
    hung = client.submit(time.sleep, 120, key="audit-tile-hung-r1", pure=False)
    quick = [
        client.submit(time.sleep, 0.1, key=f"audit-tile-q{i}-r1", pure=False) for i in range(6)
    ]
    cancelled, finished = _run(client, [hung, *quick], 1.5)
    assert cancelled == {"audit-tile-hung-r1": timeout_reason("hung", 1.5)}
    assert finished == {f.key for f in quick}
    assert not client.lost()  # the service does not take the cancelled task for a lost cluster
    # the stuck worker was restarted: no worker thread is left inside the cancelled task
    busy = client.run(lambda dask_worker: dask_worker.state.executing_count)
    assert busy and set(busy.values()) == {0}


def test_a_queue_longer_than_the_limit_is_not_cancelled(dask_client: Any):
    client: Any = dask_client
    workers = len(client.nthreads())
    # 6 tasks of 0.4 s per worker thread: the job takes at least 2.4 s, twice the limit, while
    # each task runs well within it
    tasks = [
        client.submit(time.sleep, 0.4, key=f"audit-tile-q{i}-r2", pure=False)
        for i in range(6 * workers)
    ]
    cancelled, finished = _run(client, tasks, 1.2)
    assert cancelled == {}
    assert finished == {f.key for f in tasks}
