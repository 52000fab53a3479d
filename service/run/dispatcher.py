"""The dispatcher: the life of a job from submission to its end, on worker threads.

::

    submit ──► accepted ──► running ──► successful
                  │            ├──────► failed      (bad input, cluster or store fault, a crash,
                  │            │                     no progress, a server shut-down)
                  └────────────┴──────► dismissed   (DELETE /jobs/{id}; tile tasks cancelled)

``demaudit.service.run.runner.run_job`` is synchronous, so each job runs on a thread of a bounded
pool
(``max_running_jobs``); the rest wait as ``accepted``. All jobs share one Dask client (a
``demaudit.service.run.cluster.ClusterConnection``, made anew after a scheduler outage; submissions
are
refused with ClusterUnavailableError while the scheduler does not answer); each job sees it
through a ``JobClient`` that remembers its futures. Every status change is a compare-and-set in
the job store, so a dismissal racing the end of a job leaves one consistent record. A job that
does not end successfully leaves no results behind (its ``<id>.partial-*`` folder included).
A scheduled run (``demaudit.service.scheduling.scheduler``) carries its schedule's id and may name
a baseline run;
``on_end`` hears of every job's end (``demaudit.service.scheduling.notify`` sends the schedules'
webhooks).

Faults (causes and recovery live in ``demaudit.service.run.faults``): a failed job records its
``cause``
(``CAUSES``, from :func:`failure_of`). A watchdog
thread fails a job none of whose waiting tasks finished for ``stall_timeout_s`` while no worker
runs any of them ("no tile finished for N s; workers: W": every worker gone, or none takes
them; a task that runs for ever is not caught); a job whose futures the lost scheduler
cancelled fails as ``cluster-unavailable``; a job whose record cannot be written fails with the
store's error (retried until written; logged, and ``store_problem`` tells the readiness probe).

Ownership: each dispatcher is one runner instance (``host:pid:random``), written into every job
it takes; it renews a lease in the store every ``watch_interval_s``. :func:`recover_orphans`
(at start-up and at every watchdog tick) fails the unfinished jobs of instances that are gone
and removes their partial outputs; jobs of a live neighbour sharing the store are left alone.
"""

from __future__ import annotations

import contextvars
import datetime as dt
import logging
import os
import socket
import threading
import uuid
from collections.abc import Callable, Collection, Mapping, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from concurrent.futures import wait as wait_futures
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

from demaudit.service.run.cluster import ClusterConnection, ClusterUnavailableError, JobClient
from demaudit.service.run.faults import (
    CAUSES,
    CLUSTER,
    INPUT,
    INTERNAL,
    INTERNAL_FAILURE,
    INTERRUPTED,
    LOST_MESSAGE,
    RESOURCES,
    RESTART_MESSAGE,
    RESTART_QUEUED_MESSAGE,
    SHUTDOWN_MESSAGE,
    StoreWriteError,
    failure_of,
    new_instance_id,
    orphan_reason,
    recover_after_restart,
    recover_orphans,
    remove_outputs,
)
from demaudit.service.run.runner import UNAUDITED, JobDismissedError, run_job
from demaudit.service.store.jobs import (
    ACCEPTED,
    DISMISSED,
    FAILED,
    FINISHED,
    RUNNING,
    SUCCESSFUL,
    JobRecord,
    JobStatus,
    JobStore,
    Lease,
    utc_now,
)
from demaudit.workers.spec import ResolvedJob

__all__ = [
    "CAUSES",
    "CLUSTER",
    "INPUT",
    "INTERNAL",
    "INTERNAL_FAILURE",
    "INTERRUPTED",
    "LOST_MESSAGE",
    "PROCESS_ID",
    "RESOURCES",
    "RESTART_MESSAGE",
    "RESTART_QUEUED_MESSAGE",
    "SHUTDOWN_MESSAGE",
    "EndHook",
    "JobDispatcher",
    "Runner",
    "StoreWriteError",
    "current_job_id",
    "failure_of",
    "new_instance_id",
    "new_job_id",
    "orphan_reason",
    "recover_after_restart",
    "recover_orphans",
    "remove_outputs",
]

PROCESS_ID = "dem-audit"

current_job_id: contextvars.ContextVar[str | None] = contextvars.ContextVar(
    "current_job_id", default=None
)
"""The job whose work the current thread does (read by the JSON log formatter)."""

log = logging.getLogger("demaudit.jobs")


class Runner(Protocol):
    """What runs one job: ``demaudit.service.run.runner.run_job`` or a stand-in in tests
    (``baseline`` is
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


@dataclass
class _Active:
    """A job of this dispatcher that has not ended."""

    stop: threading.Event = field(default_factory=threading.Event)
    future: Future[None] | None = None
    client: JobClient | None = None
    failure: tuple[str, str] | None = None
    """(cause, message) once the job must fail (stalled, cluster lost, store write failed)."""

    def should_stop(self) -> bool:
        if self.failure is None and self.client is not None and self.client.lost():
            self.failure = (CLUSTER, LOST_MESSAGE)
        return self.stop.is_set() or self.failure is not None


class JobDispatcher:
    """Runs jobs on a thread pool against one Dask client and keeps the store up to date.

    client is a ClusterConnection (or a bare client, kept as it is). stall_timeout_s: a job
    none of whose waiting tasks finished for that long, and none of which a worker runs now,
    fails (None: never). lease_s: how long
    this instance's lease lasts without renewal; watch_interval_s: the watchdog's tick (lease
    renewal, stall checks, orphan sweep, retry of unrecorded ends). Call :meth:`start` to run
    the watchdog.
    """

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
        stall_timeout_s: float | None = None,
        lease_s: float = 60.0,
        watch_interval_s: float = 2.0,
        instance: str | None = None,
    ) -> None:
        self.store = store
        self._on_end = on_end
        self.results_dir = Path(results_dir)
        self._cluster = (
            client if isinstance(client, ClusterConnection) else ClusterConnection(client)
        )
        self._grid_dirs = tuple(grid_dirs)
        self._retries = retries
        self._runner = runner
        self._pool = ThreadPoolExecutor(max_running_jobs, thread_name_prefix="demaudit-job")
        self._lock = threading.Lock()
        self._active: dict[str, _Active] = {}
        self._closing = False
        self.stall_timeout_s = stall_timeout_s
        self.lease_s = lease_s
        self.watch_interval_s = watch_interval_s
        self.instance = instance or new_instance_id()
        self._unrecorded: dict[str, dict[str, Any]] = {}
        self._store_problem: str | None = None
        self._watch_stop = threading.Event()
        self._watcher: threading.Thread | None = None

    @property
    def cluster(self) -> ClusterConnection:
        """The shared connection to the Dask scheduler."""
        return self._cluster

    def results_path(self, job_id: str) -> Path:
        """The output folder of job_id (summary.json, results.zarr)."""
        return self.results_dir / job_id

    def store_problem(self) -> str | None:
        """Why the last write to the job store failed, until a later one succeeds."""
        return self._store_problem

    # --- lifecycle ---------------------------------------------------------------------------

    def start(self) -> None:
        """Take the lease, fail the jobs of gone instances, start the watchdog thread."""
        self._renew_lease()
        recover_orphans(self.store, results_dir=self.results_dir, instance=self.instance)
        if self._watcher is None:
            self._watcher = threading.Thread(
                target=self._watch, name="demaudit-watchdog", daemon=True
            )
            self._watcher.start()

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
        is the principal the job belongs to. ClusterUnavailableError while the Dask scheduler
        does not answer (nothing is recorded)."""
        if not self._cluster.available():
            where = f" at {self._cluster.address}" if self._cluster.address else ""
            raise ClusterUnavailableError(
                f"the Dask scheduler{where} does not answer; new jobs are refused until it "
                "does (see /health/ready)"
            )
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
            runner_instance=self.instance,
        )
        with self._lock:
            if self._closing:
                raise RuntimeError("the dispatcher is shutting down")
            self.store.add(record)
            active = self._active[record.job_id] = _Active()
            active.future = self._pool.submit(self._run, record.job_id, job, baseline)
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
            active = self._active.get(job_id)
            if active is not None:
                active.stop.set()  # the job's thread cancels its tasks and removes its outputs
            else:
                self._remove_results(job_id)
        log.info("job dismissed", extra={"job_id": job_id})
        return new

    def active(self) -> int:
        """Jobs of this process that have not ended (waiting or running)."""
        with self._lock:
            return len(self._active)

    def close(self, *, timeout: float = 30.0) -> None:
        """Stop taking jobs; fail and stop the unfinished ones; wait up to timeout seconds;
        give up the lease."""
        with self._lock:
            self._closing = True
            for job_id, active in self._active.items():
                changes = {
                    "status": FAILED,
                    "finished": utc_now(),
                    "message": SHUTDOWN_MESSAGE,
                    "cause": INTERRUPTED,
                }
                try:
                    self._write(job_id, changes, only_from={ACCEPTED, RUNNING})
                except StoreWriteError:
                    log.error("could not record the shut-down of a job", extra={"job_id": job_id})
                active.stop.set()
            futures = [a.future for a in self._active.values() if a.future is not None]
        self._pool.shutdown(wait=False, cancel_futures=True)
        done, pending = wait_futures(futures, timeout=timeout)
        if pending:
            log.warning("%d job threads still running at shut-down", len(pending))
        self._watch_stop.set()
        if self._watcher is not None:
            self._watcher.join(timeout=10)
        try:
            self.store.drop_lease(self.instance)
        except Exception:  # noqa: BLE001 - the lease then runs out by itself
            log.warning("could not give up the runner lease", exc_info=True)

    # --- the watchdog ------------------------------------------------------------------------

    def _watch(self) -> None:
        while not self._watch_stop.wait(self.watch_interval_s):
            try:
                self.watch_once()
            except Exception:  # noqa: BLE001 - the watchdog must outlive any one fault
                log.exception("watchdog tick failed")

    def watch_once(self) -> None:
        """One watchdog tick: renew the lease, stop stalled jobs, write ends that could not be
        written, fail the jobs of instances that are gone."""
        self._renew_lease()
        self._check_stalls()
        self._retry_unrecorded()
        try:
            recover_orphans(self.store, results_dir=self.results_dir, instance=self.instance)
        except Exception as exc:  # noqa: BLE001 - reported by the probe, retried next tick
            self._note_store_failure(exc)

    def _renew_lease(self) -> None:
        host, pid = socket.gethostname(), os.getpid()
        expires = utc_now() + dt.timedelta(seconds=self.lease_s)
        try:
            self.store.renew_lease(Lease(self.instance, host, pid, expires))
        except Exception as exc:  # noqa: BLE001 - logged, and the readiness probe says so
            self._note_store_failure(exc)

    def _check_stalls(self) -> None:
        limit = self.stall_timeout_s
        if limit is None:
            return
        with self._lock:
            running = [(k, a) for k, a in self._active.items() if a.client is not None]
        for job_id, active in running:
            assert active.client is not None
            if active.failure is not None or active.stop.is_set():
                continue
            if active.client.lost():
                active.failure = (CLUSTER, LOST_MESSAGE)
                continue
            if active.client.stalled_for() < limit or active.client.busy():
                continue  # progress, or a slow task still running on a worker
            workers = _workers(self._cluster)
            active.failure = (CLUSTER, f"no tile finished for {limit:g} s; workers: {workers}")
            log.warning("job stalled: %s", active.failure[1], extra={"job_id": job_id})
            try:
                active.client.cancel_all()  # wakes the job's thread, which then ends the job
            except Exception:  # noqa: BLE001 - the thread still sees the failure
                log.warning("cancelling a stalled job's tasks failed", exc_info=True)

    # --- store writes ------------------------------------------------------------------------

    def _write(
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
            self._note_store_failure(exc)
            raise StoreWriteError(
                f"the job store could not be written ({type(exc).__name__}: {exc})"
            ) from exc
        self._store_problem = None
        return record

    def _note_store_failure(self, exc: BaseException) -> None:
        self._store_problem = f"{type(exc).__name__}: {exc}"
        log.error("job store write failed: %s", self._store_problem)

    def _write_end(self, job_id: str, changes: dict[str, Any]) -> None:
        """Record a job's failure; when the store refuses, keep it to retry at every tick (a
        restart would fail the job anyway)."""
        try:
            self._write(job_id, changes, only_from={RUNNING, ACCEPTED})
        except StoreWriteError as exc:
            log.error("the end of the job is not recorded yet: %s", exc, extra={"job_id": job_id})
            with self._lock:
                self._unrecorded[job_id] = changes

    def _retry_unrecorded(self) -> None:
        with self._lock:
            waiting = dict(self._unrecorded)
        for job_id, changes in waiting.items():
            try:
                self._write(job_id, changes, only_from={RUNNING, ACCEPTED})
            except StoreWriteError:
                continue
            with self._lock:
                self._unrecorded.pop(job_id, None)
            log.info("the end of the job is recorded now", extra={"job_id": job_id})

    # --- the job's thread --------------------------------------------------------------------

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
        started = self._write(
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
                **extra,
            )
        except Exception as exc:
            self._failed(job_id, active, exc)
            return None
        if active.should_stop() and active.failure is not None:  # it finished all the same
            self._end_unsuccessful(job_id, active.failure)
            return None
        return self._succeeded(job_id, document)

    def _failed(self, job_id: str, active: _Active, exc: Exception) -> None:
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
                done = self._write(job_id, changes, only_from={RUNNING})
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
            self._write_end(job_id, changes)
        try:
            record = self.store.get(job_id)
            if record is not None and record.status == DISMISSED:
                self._write(
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
            self._write(
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


def _workers(cluster: ClusterConnection) -> int:
    try:
        if cluster.status != "running":
            return 0
        return len(cluster.nthreads())
    except Exception:  # noqa: BLE001 - a scheduler that does not answer has no workers for us
        return 0


def is_finished(record: JobRecord) -> bool:
    """Whether the job has ended (successful, failed or dismissed)."""
    return record.status in FINISHED
