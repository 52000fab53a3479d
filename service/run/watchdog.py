"""What the dispatcher's watchdog knows of a running job, and how it tells a stalled job."""

from __future__ import annotations

import logging
import threading
from concurrent.futures import Future
from dataclasses import dataclass, field

from demaudit.service.run.cluster import ClusterConnection, JobClient
from demaudit.service.run.faults import CLUSTER, LOST_MESSAGE

__all__ = ["ActiveJob", "check_stall"]

log = logging.getLogger("demaudit.jobs")


@dataclass
class ActiveJob:
    """A job of this dispatcher that has not ended."""

    stop: threading.Event = field(default_factory=threading.Event)
    future: Future[None] | None = None
    client: JobClient | None = None
    failure: tuple[str, str] | None = None
    """(cause, message) once the job must fail (stalled, cluster lost, store write failed)."""

    def should_stop(self) -> bool:
        """Whether the job must stop: dismissed, shut down, or failing (a lost cluster is
        noticed here)."""
        if self.failure is None and self.client is not None and self.client.lost():
            self.failure = (CLUSTER, LOST_MESSAGE)
        return self.stop.is_set() or self.failure is not None


def check_stall(
    job_id: str, active: ActiveJob, *, limit: float, cluster: ClusterConnection
) -> None:
    """Fail active when its cluster is lost, or when none of its waiting tasks finished for limit
    seconds while no worker runs any of them (its tasks are then cancelled, which wakes the
    job's thread to end the job)."""
    client = active.client
    if client is None or active.failure is not None or active.stop.is_set():
        return
    if client.lost():
        active.failure = (CLUSTER, LOST_MESSAGE)
        return
    if client.stalled_for() < limit or client.busy():
        return  # progress, or a slow task still running on a worker
    workers = _workers(cluster)
    active.failure = (CLUSTER, f"no tile finished for {limit:g} s; workers: {workers}")
    log.warning("job stalled: %s", active.failure[1], extra={"job_id": job_id})
    try:
        client.cancel_all()
    except Exception:  # noqa: BLE001 - the thread still sees the failure
        log.warning("cancelling a stalled job's tasks failed", exc_info=True)


def _workers(cluster: ClusterConnection) -> int:
    try:
        if cluster.status != "running":
            return 0
        return len(cluster.nthreads())
    except Exception:  # noqa: BLE001 - a scheduler that does not answer has no workers for us
        return 0
