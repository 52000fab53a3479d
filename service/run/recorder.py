"""The job store as the dispatcher writes it: compare-and-set updates that note a refusing store
for the readiness probe, and job ends kept to retry while the store refuses them."""

from __future__ import annotations

import logging
import threading
from collections.abc import Collection, Mapping
from typing import Any

from demaudit.service.run.faults import StoreWriteError
from demaudit.service.store.jobs import ACCEPTED, RUNNING, JobRecord, JobStatus, JobStore

__all__ = ["JobRecorder"]

log = logging.getLogger("demaudit.jobs")


class JobRecorder:
    """Writes job records into store and remembers why the last write failed."""

    def __init__(self, store: JobStore) -> None:
        self.store = store
        self._lock = threading.Lock()
        self._problem: str | None = None
        self._unrecorded: dict[str, dict[str, Any]] = {}

    def problem(self) -> str | None:
        """Why the last write to the job store failed, until a later one succeeds."""
        return self._problem

    def write(
        self,
        job_id: str,
        changes: Mapping[str, Any],
        *,
        only_from: Collection[JobStatus] | None = None,
    ) -> JobRecord | None:
        """store.update; StoreWriteError (noted for the readiness probe) when it fails."""
        try:
            record = self.store.update(job_id, changes, only_from=only_from)
        except Exception as exc:
            self.note_failure(exc)
            raise StoreWriteError(
                f"the job store could not be written ({type(exc).__name__}: {exc})"
            ) from exc
        self._problem = None
        return record

    def note_failure(self, exc: BaseException) -> None:
        """Remember (and log) a failed store operation for the readiness probe."""
        self._problem = f"{type(exc).__name__}: {exc}"
        log.error("job store write failed: %s", self._problem)

    def write_end(self, job_id: str, changes: dict[str, Any]) -> None:
        """Record a job's failure; when the store refuses, keep it to retry at every tick (a
        restart would fail the job anyway)."""
        try:
            self.write(job_id, changes, only_from={RUNNING, ACCEPTED})
        except StoreWriteError as exc:
            log.error("the end of the job is not recorded yet: %s", exc, extra={"job_id": job_id})
            with self._lock:
                self._unrecorded[job_id] = changes

    def retry_unrecorded(self) -> None:
        """Write the job ends the store refused before."""
        with self._lock:
            waiting = dict(self._unrecorded)
        for job_id, changes in waiting.items():
            try:
                self.write(job_id, changes, only_from={RUNNING, ACCEPTED})
            except StoreWriteError:
                continue
            with self._lock:
                self._unrecorded.pop(job_id, None)
            log.info("the end of the job is recorded now", extra={"job_id": job_id})
