"""The job's thread: one job run to its end (or stopped) and its end recorded.

``JobThreads`` is the part of ``demaudit.service.run.dispatcher.JobDispatcher`` that runs on the
job's own thread: it calls the runner, turns what ended the job into a record (successful with
its counts, failed with a cause, or the dismissal completed) and removes the outputs of a job
that did not succeed before its record says it ended.
"""

from __future__ import annotations

import contextvars
import logging
import threading
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, Protocol

from demaudit.service.run.cluster import ClusterConnection, JobClient
from demaudit.service.run.faults import (
    CLUSTER,
    INTERNAL,
    INTERNAL_FAILURE,
    StoreWriteError,
    failure_of,
    remove_outputs,
)
from demaudit.service.run.recorder import JobRecorder
from demaudit.service.run.watchdog import ActiveJob
from demaudit.service.store.jobs import (
    ACCEPTED,
    DISMISSED,
    FAILED,
    RUNNING,
    SUCCESSFUL,
    JobRecord,
    JobStore,
    utc_now,
)
from demaudit.workers.errors import JobDismissedError
from demaudit.workers.outputs.tile_records import UNAUDITED
from demaudit.workers.spec import ResolvedJob

__all__ = ["EndHook", "JobThreads", "Runner", "current_job_id"]

log = logging.getLogger("demaudit.jobs")

current_job_id: contextvars.ContextVar[str | None] = contextvars.ContextVar(
    "current_job_id", default=None
)
"""The job whose work the current thread does (read by the JSON log formatter)."""


class Runner(Protocol):
    """What runs one job: ``demaudit.service.run.runner.run_job`` or a stand-in in tests
    (``baseline`` is passed only when a scheduled run names one)."""

    def __call__(
        self,
        job: ResolvedJob,
        out_dir: Path,
        *,
        client: Any,
        grid_dirs: Sequence[str],
        progress: Callable[[int, int], None],
        should_stop: Callable[[], bool],
        run_id: str,
        retries: int,
        tile_timeout_s: float | None,
        baseline: Path | None = None,
    ) -> dict[str, Any]: ...


EndHook = Callable[[JobRecord, dict[str, Any] | None], None]
"""Called on the job's thread once a job has ended: its final record and, when it succeeded,
its summary document."""


class JobThreads:
    """Runs one job on the calling thread and records its end (see the module docstring)."""

    store: JobStore
    results_dir: Path
    _recorder: JobRecorder
    _cluster: ClusterConnection
    _runner: Runner
    _grid_dirs: tuple[str, ...]
    _retries: int
    _tile_timeout_s: float | None
    _lock: threading.Lock
    _active: dict[str, ActiveJob]
    _on_end: EndHook | None

    def results_path(self, job_id: str) -> Path:
        """The output folder of job_id (summary.json, results.zarr)."""
        return self.results_dir / job_id

    def _run(self, job_id: str, job: ResolvedJob, baseline: Path | None = None) -> None:
        token = current_job_id.set(job_id)
        try:
            try:
                document = self._run_job(job_id, job, baseline)
            except Exception as exc:  # noqa: BLE001 - a job never dies silently
                log.exception("job thread failed", extra={"job_id": job_id})
                self._end_unsuccessful(job_id, failure_of(exc))
                document = None
            finally:
                with self._lock:
                    self._active.pop(job_id, None)
            self._ended(job_id, document)
        finally:
            current_job_id.reset(token)

    def _ended(self, job_id: str, document: dict[str, Any] | None) -> None:
        """Tell on_end of the job's end (its failures are logged, never raised)."""
        if self._on_end is None:
            return
        try:
            record = self.store.get(job_id)
            if record is not None:
                self._on_end(record, document if record.status == SUCCESSFUL else None)
        except Exception:
            log.exception("end-of-job hook failed", extra={"job_id": job_id})

    def _run_job(
        self, job_id: str, job: ResolvedJob, baseline: Path | None
    ) -> dict[str, Any] | None:
        """Run the job to its end and record it; the summary document when it succeeded."""
        active = self._active[job_id]
        started = self._recorder.write(
            job_id,
            {"status": RUNNING, "started": utc_now(), "message": "reading the tile catalogs"},
            only_from={ACCEPTED},
        )
        if started is None:  # dismissed (or the server shut down) while it waited
            return None
        log.info("job started", extra={"job_id": job_id})
        if not self._cluster.available():
            self._end_unsuccessful(job_id, (CLUSTER, "the Dask scheduler does not answer"))
            return None
        active.client = JobClient(self._cluster.client)
        out_dir = self.results_path(job_id)
        extra: dict[str, Any] = {} if baseline is None else {"baseline": baseline}
        try:
            document = self._runner(
                job,
                out_dir,
                client=active.client,
                grid_dirs=self._grid_dirs,
                progress=lambda done, total: self._progress(job_id, done, total),
                should_stop=active.should_stop,
                run_id=job_id,
                retries=self._retries,
                tile_timeout_s=self._tile_timeout_s,
                **extra,
            )
        except Exception as exc:
            self._failed(job_id, active, exc)
            return None
        if active.should_stop() and active.failure is not None:  # it finished all the same
            self._end_unsuccessful(job_id, active.failure)
            return None
        return self._succeeded(job_id, document)

    def _failed(self, job_id: str, active: ActiveJob, exc: Exception) -> None:
        active.should_stop()  # notices a lost cluster
        if active.failure is not None:
            failure: tuple[str, str] | None = active.failure
            log.info("job failed: %s", active.failure[1], extra={"job_id": job_id})
        elif isinstance(exc, JobDismissedError):
            failure = None
        else:
            failure = failure_of(exc)
            if failure[0] == INTERNAL and failure[1] == INTERNAL_FAILURE:
                log.error("job crashed", exc_info=exc, extra={"job_id": job_id})
            else:
                log.info("job failed: %s", failure[1], extra={"job_id": job_id})
        self._end_unsuccessful(job_id, failure)

    def _succeeded(self, job_id: str, document: dict[str, Any]) -> dict[str, Any] | None:
        tiles = document["job"]["tiles"]
        failed = int(tiles["failed"])
        message = f"finished: {tiles['test']} test tiles, {failed} failed"
        left_out = [t for t in document.get("tiles", []) if t.get("status") in UNAUDITED]
        if left_out:
            message += f", {len(left_out)} not audited (see the cautions)"
        changes = {"status": SUCCESSFUL, "finished": utc_now(), "progress": 100, "message": message}
        with self._lock:
            try:
                done = self._recorder.write(job_id, changes, only_from={RUNNING})
            except StoreWriteError as exc:
                done = None
                failure: tuple[str, str] | None = failure_of(exc)
            else:
                failure = None
            if done is None:  # dismissed or shut down at the last moment, or not recorded
                self._remove_results(job_id)
        if failure is not None:
            self._end_unsuccessful(job_id, failure)
            return None
        log.info("job %s", message, extra={"job_id": job_id})
        return document if done is not None else None

    def _end_unsuccessful(self, job_id: str, failure: tuple[str, str] | None) -> None:
        """Remove partial outputs, then record the failure (cause, message), or complete the
        dismissal's record: once a job reads as ended, its folder is gone."""
        with self._lock:
            self._remove_results(job_id)
        if failure is not None:
            cause, message = failure
            changes = {"status": FAILED, "finished": utc_now(), "message": message, "cause": cause}
            self._recorder.write_end(job_id, changes)
        try:
            record = self.store.get(job_id)
            if record is not None and record.status == DISMISSED:
                self._recorder.write(
                    job_id,
                    {
                        "message": f"dismissed by request after {record.tiles_done} of "
                        f"{record.tiles_total} tiles; remaining tile tasks cancelled"
                    },
                    only_from={DISMISSED},
                )
        except Exception:  # noqa: BLE001 - the dismissal itself is recorded already
            log.warning("could not complete the dismissal's message", extra={"job_id": job_id})
        log.info("job ended without results", extra={"job_id": job_id})

    def _progress(self, job_id: str, done: int, total: int) -> None:
        per_cent = min(99, done * 100 // total) if total else 0
        try:
            self._recorder.write(
                job_id,
                {
                    "tiles_done": done,
                    "tiles_total": total,
                    "progress": per_cent,
                    "message": f"{done} of {total} tiles done",
                },
                only_from={RUNNING},
            )
        except StoreWriteError as exc:  # the job stops at its next tile and fails with this
            with self._lock:
                active = self._active.get(job_id)
            if active is not None and active.failure is None:
                active.failure = failure_of(exc)

    def _remove_results(self, job_id: str) -> None:
        remove_outputs(self.results_dir, job_id)
