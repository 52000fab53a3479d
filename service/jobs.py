"""The dispatcher: the life of a job from submission to its end, on worker threads.

::

    submit ──► accepted ──► running ──► successful
                  │            ├──────► failed      (bad input, a crash, a server shut-down)
                  └────────────┴──────► dismissed   (DELETE /jobs/{id}; tile tasks cancelled)

``service.runner.run_job`` is synchronous, so each job runs on a thread of a bounded pool
(``max_running_jobs``); the rest wait as ``accepted``. All jobs share one Dask client. Every
status change is a compare-and-set in the job store, so a dismissal racing the end of a job
leaves one consistent record. A job that does not end successfully leaves no results behind.
A scheduled run (``service.scheduler``) carries its schedule's id and may name a baseline run;
``on_end`` hears of every job's end (``service.notify`` sends the schedules' webhooks).
"""

from __future__ import annotations

import contextvars
import logging
import shutil
import threading
import uuid
from collections.abc import Callable, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from concurrent.futures import wait as wait_futures
from pathlib import Path
from typing import Any, Protocol

from service.jobstore import (
    ACCEPTED,
    DISMISSED,
    FAILED,
    FINISHED,
    RUNNING,
    SUCCESSFUL,
    JobRecord,
    JobStore,
    utc_now,
)
from service.runner import UNAUDITED, JobDismissedError, run_job
from workers.errors import AuditError
from workers.spec import ResolvedJob

__all__ = [
    "PROCESS_ID",
    "RESTART_MESSAGE",
    "EndHook",
    "JobDispatcher",
    "Runner",
    "current_job_id",
    "new_job_id",
    "recover_after_restart",
]

PROCESS_ID = "dem-audit"
RESTART_MESSAGE = "server restarted while the job ran"
RESTART_QUEUED_MESSAGE = "server restarted before the job started; submit it again"
SHUTDOWN_MESSAGE = "server shut down while the job ran"
INTERNAL_FAILURE = "internal error while running the job (details are in the server log)"
MESSAGE_LIMIT = 2000

current_job_id: contextvars.ContextVar[str | None] = contextvars.ContextVar(
    "current_job_id", default=None
)
"""The job whose work the current thread does (read by the JSON log formatter)."""

log = logging.getLogger("demaudit.jobs")


class Runner(Protocol):
    """What runs one job: ``service.runner.run_job`` or a stand-in in tests (``baseline`` is
    passed only when a scheduled run names one)."""

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
        baseline: Path | None = None,
    ) -> dict[str, Any]: ...


EndHook = Callable[[JobRecord, dict[str, Any] | None], None]
"""Called on the job's thread once a job has ended: its final record and, when it succeeded,
its summary document."""


def new_job_id() -> str:
    """A new job id: 32 hex digits (no dashes: the runner's task keys end in '-<job id>')."""
    return uuid.uuid4().hex


def recover_after_restart(store: JobStore) -> list[str]:
    """Fail the jobs a previous server process left unfinished; return their ids.

    Jobs are not resumed: their tile tasks died with the old process's Dask client, and a new
    run would re-read data that may have changed since the submission.
    """
    running = store.fail_unfinished(RUNNING, RESTART_MESSAGE)
    queued = store.fail_unfinished(ACCEPTED, RESTART_QUEUED_MESSAGE)
    for job_id in [*running, *queued]:
        log.warning("job marked failed after a restart", extra={"job_id": job_id})
    return [*running, *queued]


class JobDispatcher:
    """Runs jobs on a thread pool against one Dask client and keeps the store up to date."""

    def __init__(
        self,
        store: JobStore,
        *,
        client: Any,
        results_dir: Path,
        grid_dirs: Sequence[str],
        max_running_jobs: int = 4,
        retries: int = 1,
        runner: Runner = run_job,
        on_end: EndHook | None = None,
    ) -> None:
        self.store = store
        self._on_end = on_end
        self.results_dir = Path(results_dir)
        self._client = client
        self._grid_dirs = tuple(grid_dirs)
        self._retries = retries
        self._runner = runner
        self._pool = ThreadPoolExecutor(max_running_jobs, thread_name_prefix="demaudit-job")
        self._lock = threading.Lock()
        self._stops: dict[str, threading.Event] = {}
        self._futures: dict[str, Future[None]] = {}
        self._closing = False

    def results_path(self, job_id: str) -> Path:
        """The output folder of job_id (summary.json, results.zarr)."""
        return self.results_dir / job_id

    def submit(
        self,
        job: ResolvedJob,
        inputs: dict[str, Any],
        *,
        schedule_id: str | None = None,
        baseline: Path | None = None,
        owner: str | None = None,
    ) -> JobRecord:
        """Record a new job as accepted and queue it; return its record. A scheduled run gives
        its schedule_id, and baseline when it re-checks against an earlier run's folder; owner
        is the principal the job belongs to."""
        now = utc_now()
        record = JobRecord(
            job_id=new_job_id(),
            process_id=PROCESS_ID,
            status=ACCEPTED,
            message="accepted, waiting for a free slot",
            created=now,
            updated=now,
            inputs=inputs,
            schedule_id=schedule_id,
            owner=owner,
        )
        with self._lock:
            if self._closing:
                raise RuntimeError("the dispatcher is shutting down")
            self.store.add(record)
            self._stops[record.job_id] = threading.Event()
            self._futures[record.job_id] = self._pool.submit(
                self._run, record.job_id, job, baseline
            )
        log.info("job accepted", extra={"job_id": record.job_id})
        return record

    def dismiss(self, job_id: str) -> JobRecord | None:
        """Dismiss job_id: a waiting or running job stops (its tile tasks are cancelled on the
        cluster), a finished one loses its results. None when there is no such job."""
        with self._lock:
            for _ in range(5):  # the status may change under us: retry the compare-and-set
                record = self.store.get(job_id)
                if record is None or record.status == DISMISSED:
                    return record
                changes = {
                    "status": DISMISSED,
                    "finished": record.finished or utc_now(),
                    "message": "dismissed by request",
                }
                new = self.store.update(job_id, changes, only_from={record.status})
                if new is not None:
                    break
            else:
                raise RuntimeError(f"job {job_id} kept changing status; dismissal not applied")
            stop = self._stops.get(job_id)
            if stop is not None:
                stop.set()  # the job's thread cancels its tasks and removes its outputs
            else:
                self._remove_results(job_id)
        log.info("job dismissed", extra={"job_id": job_id})
        return new

    def active(self) -> int:
        """Jobs of this process that have not ended (waiting or running)."""
        with self._lock:
            return len(self._stops)

    def close(self, *, timeout: float = 30.0) -> None:
        """Stop taking jobs; fail and stop the unfinished ones; wait up to timeout seconds."""
        with self._lock:
            self._closing = True
            for job_id, stop in self._stops.items():
                self.store.update(
                    job_id,
                    {"status": FAILED, "finished": utc_now(), "message": SHUTDOWN_MESSAGE},
                    only_from={ACCEPTED, RUNNING},
                )
                stop.set()
            futures = list(self._futures.values())
        self._pool.shutdown(wait=False, cancel_futures=True)
        done, pending = wait_futures(futures, timeout=timeout)
        if pending:
            log.warning("%d job threads still running at shut-down", len(pending))

    # --- the job's thread -----------------------------------------------------------------

    def _run(self, job_id: str, job: ResolvedJob, baseline: Path | None = None) -> None:
        token = current_job_id.set(job_id)
        try:
            try:
                document = self._run_job(job_id, job, baseline)
            finally:
                with self._lock:
                    self._stops.pop(job_id, None)
                    self._futures.pop(job_id, None)
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
        stop = self._stops[job_id]
        started = self.store.update(
            job_id,
            {"status": RUNNING, "started": utc_now(), "message": "reading the tile catalogs"},
            only_from={ACCEPTED},
        )
        if started is None:  # dismissed (or the server shut down) while it waited
            return None
        log.info("job started", extra={"job_id": job_id})
        out_dir = self.results_path(job_id)
        extra: dict[str, Any] = {} if baseline is None else {"baseline": baseline}
        try:
            document = self._runner(
                job,
                out_dir,
                client=self._client,
                grid_dirs=self._grid_dirs,
                progress=lambda done, total: self._progress(job_id, done, total),
                should_stop=stop.is_set,
                run_id=job_id,
                retries=self._retries,
                **extra,
            )
        except JobDismissedError:
            self._end_unsuccessful(job_id, None)
        except AuditError as exc:
            log.info("job failed: %s", exc, extra={"job_id": job_id})
            self._end_unsuccessful(job_id, _clip(str(exc)))
        except Exception:
            log.exception("job crashed", extra={"job_id": job_id})
            self._end_unsuccessful(job_id, INTERNAL_FAILURE)
        else:
            tiles = document["job"]["tiles"]
            failed = int(tiles["failed"])
            message = f"finished: {tiles['test']} test tiles, {failed} failed"
            left_out = [t for t in document.get("tiles", []) if t.get("status") in UNAUDITED]
            if left_out:
                message += f", {len(left_out)} not audited (see the cautions)"
            with self._lock:
                done = self.store.update(
                    job_id,
                    {
                        "status": SUCCESSFUL,
                        "finished": utc_now(),
                        "progress": 100,
                        "message": message,
                    },
                    only_from={RUNNING},
                )
                if done is None:  # dismissed or shut down at the last moment
                    self._remove_results(job_id)
            log.info("job %s", message, extra={"job_id": job_id})
            return document
        return None

    def _end_unsuccessful(self, job_id: str, failure: str | None) -> None:
        """Remove partial outputs, then record the failure (or complete the dismissal's
        record): once a job reads as ended, its folder is gone."""
        with self._lock:
            self._remove_results(job_id)
            if failure is not None:
                self.store.update(
                    job_id,
                    {"status": FAILED, "finished": utc_now(), "message": failure},
                    only_from={RUNNING},
                )
            record = self.store.get(job_id)
            if record is not None and record.status == DISMISSED:
                self.store.update(
                    job_id,
                    {
                        "message": f"dismissed by request after {record.tiles_done} of "
                        f"{record.tiles_total} tiles; remaining tile tasks cancelled"
                    },
                    only_from={DISMISSED},
                )
        log.info("job ended without results", extra={"job_id": job_id})

    def _progress(self, job_id: str, done: int, total: int) -> None:
        per_cent = min(99, done * 100 // total) if total else 0
        self.store.update(
            job_id,
            {
                "tiles_done": done,
                "tiles_total": total,
                "progress": per_cent,
                "message": f"{done} of {total} tiles done",
            },
            only_from={RUNNING},
        )

    def _remove_results(self, job_id: str) -> None:
        shutil.rmtree(self.results_path(job_id), ignore_errors=True)


def is_finished(record: JobRecord) -> bool:
    """Whether the job has ended (successful, failed or dismissed)."""
    return record.status in FINISHED


def _clip(message: str) -> str:
    return message if len(message) <= MESSAGE_LIMIT else message[: MESSAGE_LIMIT - 3] + "..."
