"""How the watchdog tells a stalled job from a slow one, without Dask."""

from __future__ import annotations

from typing import Any

from demaudit.service.run.faults import CLUSTER, LOST_MESSAGE
from demaudit.service.run.watchdog import ActiveJob, check_stall


class Client:
    """A stand-in JobClient."""

    def __init__(self, *, lost: bool = False, stalled_for: float = 0.0, busy: bool = False):
        self._lost, self._stalled_for, self._busy = lost, stalled_for, busy
        self.cancelled = False

    def lost(self) -> bool:
        return self._lost

    def stalled_for(self) -> float:
        return self._stalled_for

    def busy(self) -> bool:
        return self._busy

    def cancel_all(self) -> None:
        self.cancelled = True


class Cluster:
    status = "running"

    def nthreads(self) -> dict[str, int]:
        return {"tcp://a:1": 1, "tcp://b:1": 1}


def active(client: Any) -> ActiveJob:
    job = ActiveJob()
    job.client = client
    return job


def test_a_job_waiting_past_the_limit_with_no_busy_worker_fails_and_is_cancelled():
    client = Client(stalled_for=11.0)
    job = active(client)
    check_stall("j", job, limit=10.0, cluster=Cluster())  # type: ignore[arg-type]
    assert job.failure == (CLUSTER, "no tile finished for 10 s; workers: 2")
    assert client.cancelled and job.should_stop()


def test_a_slow_task_on_a_worker_or_recent_progress_is_not_a_stall():
    for client in (Client(stalled_for=11.0, busy=True), Client(stalled_for=9.0)):
        job = active(client)
        check_stall("j", job, limit=10.0, cluster=Cluster())  # type: ignore[arg-type]
        assert job.failure is None and not client.cancelled and not job.should_stop()


def test_a_lost_cluster_fails_the_job_without_cancelling():
    client = Client(lost=True)
    job = active(client)
    check_stall("j", job, limit=10.0, cluster=Cluster())  # type: ignore[arg-type]
    assert job.failure == (CLUSTER, LOST_MESSAGE) and not client.cancelled


def test_a_dismissed_job_is_left_to_its_thread():
    client = Client(stalled_for=99.0)
    job = active(client)
    job.stop.set()
    check_stall("j", job, limit=10.0, cluster=Cluster())  # type: ignore[arg-type]
    assert job.failure is None and not client.cancelled
