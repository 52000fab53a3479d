"""The job store: one record per submitted job, behind a small contract.

:class:`JobStore` is the contract; ``demaudit.service.store.sqlite_jobs.SqliteJobStore`` is the
default (one file, safe to use from several threads of one process) and :class:`MemoryJobStore`
serves unit tests. A PostgreSQL
store would implement the same methods; :meth:`JobStore.update` is a compare-and-set on the
status, which a SQL ``UPDATE ... WHERE status IN (...)`` gives in any database.

Several API processes may share one store. Each job records the process that runs it
(``runner_instance``), and each process holds a lease in the ``runner_instances`` table that it
renews while it lives (:meth:`JobStore.renew_lease`). Start-up recovery and the periodic sweep
(``demaudit.service.run.faults.recover_orphans``) fail only the unfinished jobs of processes
that are gone: no
lease, a lease that ran out, or a process id on this host that no longer runs.

The store also keeps the schedules of nightly re-checks: the contract and both implementations
of that part are in ``demaudit.service.store.schedules`` (:class:`ScheduleStore`, which JobStore
extends).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import threading
from collections.abc import Collection, Mapping
from dataclasses import dataclass, field
from typing import Any, Literal, Protocol, get_args

from demaudit.service.store.schedules import (
    MemorySchedules,
    ScheduleStore,
)

__all__ = [
    "ACCEPTED",
    "DISMISSED",
    "FAILED",
    "FINISHED",
    "JOB_COLUMNS",
    "RUNNING",
    "STATUSES",
    "SUCCESSFUL",
    "JobRecord",
    "JobStatus",
    "JobStore",
    "Lease",
    "MemoryJobStore",
    "check_changes",
    "utc_now",
]

JobStatus = Literal["accepted", "running", "successful", "failed", "dismissed"]
ACCEPTED: JobStatus = "accepted"
RUNNING: JobStatus = "running"
SUCCESSFUL: JobStatus = "successful"
FAILED: JobStatus = "failed"
DISMISSED: JobStatus = "dismissed"
STATUSES: tuple[JobStatus, ...] = get_args(JobStatus)
FINISHED: frozenset[JobStatus] = frozenset({SUCCESSFUL, FAILED, DISMISSED})


def utc_now() -> dt.datetime:
    """The current time in UTC, to the millisecond."""
    now = dt.datetime.now(dt.UTC)
    return now.replace(microsecond=now.microsecond // 1000 * 1000)


@dataclass(frozen=True)
class JobRecord:
    """What the service knows about one job."""

    job_id: str
    process_id: str
    status: JobStatus
    message: str
    created: dt.datetime
    updated: dt.datetime
    started: dt.datetime | None = None
    finished: dt.datetime | None = None
    progress: int = 0
    """Per cent of the test tiles done (0-100)."""
    tiles_done: int = 0
    tiles_total: int = 0
    inputs: dict[str, Any] = field(default_factory=dict)
    """The job spec as submitted (JSON-compatible)."""
    schedule_id: str | None = None
    """The schedule that started this job (None for a job submitted by hand)."""
    notification: dict[str, Any] | None = None
    """How the schedule's webhook call after this job went (see
    ``demaudit.service.scheduling.notify``)."""
    owner: str | None = None
    """The principal that submitted the job (a scheduled run: the schedule's owner); None for
    a job recorded before owners were (visible to admins only)."""
    runner_instance: str | None = None
    """The API process that runs (or queued) the job: ``host:pid:random``; None for a job
    recorded before this column was."""
    cause: str | None = None
    """Why a failed job failed: ``invalid-input``, ``tile-unreadable``, ``resources-exhausted``,
    ``cluster-unavailable``, ``interrupted`` or ``internal`` (None otherwise, and for failures
    recorded before causes were)."""


@dataclass(frozen=True)
class Lease:
    """An API process's claim to its jobs: alive while ``expires`` lies ahead (it renews it)."""

    instance: str
    host: str
    pid: int
    expires: dt.datetime


JOB_COLUMNS = tuple(f.name for f in dataclasses.fields(JobRecord))
_CHANGEABLE = frozenset(JOB_COLUMNS) - {
    "job_id",
    "process_id",
    "created",
    "inputs",
    "schedule_id",
    "owner",
    "runner_instance",
}


class JobStore(ScheduleStore, Protocol):
    """Where job records (and schedules) live. Every method is safe to call from several
    threads."""

    def add(self, record: JobRecord) -> None:
        """Store a new record (its job_id must be new)."""
        ...

    def get(self, job_id: str) -> JobRecord | None:
        """The record of job_id, or None."""
        ...

    def update(
        self,
        job_id: str,
        changes: Mapping[str, Any],
        *,
        only_from: Collection[JobStatus] | None = None,
    ) -> JobRecord | None:
        """Apply changes (and set ``updated``) if the job's status is in only_from (any status
        when None); return the new record, or None when the job is missing or in another
        status."""
        ...

    def find(
        self,
        *,
        statuses: Collection[JobStatus] | None = None,
        limit: int = 10,
        offset: int = 0,
        owner: str | None = None,
    ) -> list[JobRecord]:
        """Records newest first, optionally only those in statuses and of owner."""
        ...

    def count(
        self, *, statuses: Collection[JobStatus] | None = None, owner: str | None = None
    ) -> int:
        """How many records (in statuses, of owner) there are."""
        ...

    def count_by_status(self) -> dict[JobStatus, int]:
        """Number of records in each status (every status present, zeros included)."""
        ...

    def tiles_done_total(self) -> int:
        """Tiles finished over all jobs ever recorded."""
        ...

    def fail_unfinished(self, status: JobStatus, message: str) -> list[str]:
        """Mark every job in status as failed with message (start-up recovery); their ids."""
        ...

    def check_writable(self) -> None:
        """Write a probe row (readiness); raises when the store cannot be written."""
        ...

    def renew_lease(self, lease: Lease) -> None:
        """Record (or extend) an API process's lease."""
        ...

    def drop_lease(self, instance: str) -> None:
        """Forget a process's lease (it stopped cleanly)."""
        ...

    def leases(self) -> list[Lease]:
        """Every recorded lease."""
        ...

    def close(self) -> None:
        """Release the store's resources."""
        ...


def check_changes(changes: Mapping[str, Any]) -> None:
    """ValueError when changes name a field that never changes or an unknown status."""
    unknown = set(changes) - _CHANGEABLE
    if unknown:
        raise ValueError(f"cannot change job record fields {sorted(unknown)}")
    status = changes.get("status")
    if status is not None and status not in STATUSES:
        raise ValueError(f"unknown job status {status!r}")


def _matches(record: JobRecord, statuses: Collection[JobStatus] | None, owner: str | None) -> bool:
    return (statuses is None or record.status in statuses) and (
        owner is None or record.owner == owner
    )


class MemoryJobStore(MemorySchedules):
    """Records in a dict: for unit tests (nothing survives the process)."""

    def __init__(self) -> None:
        self._records: dict[str, JobRecord] = {}
        self._runner_leases: dict[str, Lease] = {}
        self._lock = threading.Lock()
        self._open_schedules()

    def add(self, record: JobRecord) -> None:
        with self._lock:
            if record.job_id in self._records:
                raise KeyError(f"job {record.job_id} exists")
            self._records[record.job_id] = record

    def get(self, job_id: str) -> JobRecord | None:
        with self._lock:
            return self._records.get(job_id)

    def update(
        self,
        job_id: str,
        changes: Mapping[str, Any],
        *,
        only_from: Collection[JobStatus] | None = None,
    ) -> JobRecord | None:
        check_changes(changes)
        with self._lock:
            record = self._records.get(job_id)
            if record is None or (only_from is not None and record.status not in only_from):
                return None
            new = dataclasses.replace(record, **{"updated": utc_now(), **changes})
            self._records[job_id] = new
            return new

    def find(
        self,
        *,
        statuses: Collection[JobStatus] | None = None,
        limit: int = 10,
        offset: int = 0,
        owner: str | None = None,
    ) -> list[JobRecord]:
        with self._lock:
            chosen = [r for r in self._records.values() if _matches(r, statuses, owner)]
        chosen.sort(key=lambda r: (r.created, r.job_id), reverse=True)
        return chosen[offset : offset + limit]

    def count(
        self, *, statuses: Collection[JobStatus] | None = None, owner: str | None = None
    ) -> int:
        with self._lock:
            return sum(1 for r in self._records.values() if _matches(r, statuses, owner))

    def count_by_status(self) -> dict[JobStatus, int]:
        counts = dict.fromkeys(STATUSES, 0)
        with self._lock:
            for record in self._records.values():
                counts[record.status] += 1
        return counts

    def tiles_done_total(self) -> int:
        with self._lock:
            return sum(r.tiles_done for r in self._records.values())

    def fail_unfinished(self, status: JobStatus, message: str) -> list[str]:
        with self._lock:
            ids = [k for k, r in self._records.items() if r.status == status]
        now = utc_now()
        changes = {"status": FAILED, "message": message, "finished": now}
        return [k for k in ids if self.update(k, changes, only_from={status}) is not None]

    def check_writable(self) -> None:
        pass

    def renew_lease(self, lease: Lease) -> None:
        with self._lock:
            self._runner_leases[lease.instance] = lease

    def drop_lease(self, instance: str) -> None:
        with self._lock:
            self._runner_leases.pop(instance, None)

    def leases(self) -> list[Lease]:
        with self._lock:
            return list(self._runner_leases.values())

    def close(self) -> None:
        pass
