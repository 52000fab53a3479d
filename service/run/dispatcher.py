"""The dispatcher: the life of a job from submission to its end, on worker threads.

::

    submit ──► accepted ──► running ──► successful
                  │            ├──────► failed      (bad input, cluster or store fault, a crash,
                  │            │                     no progress, a server shut-down)
                  └────────────┴──────► dismissed   (DELETE /jobs/{id}; tile tasks cancelled)

``demaudit.service.run.runner.run_job`` is synchronous, so each job runs on a thread of a bounded
pool (``max_running_jobs``); the rest wait as ``accepted``. All jobs share one Dask client (a
``demaudit.service.run.cluster.ClusterConnection``, made anew after a scheduler outage;
submissions are refused with ClusterUnavailableError while the scheduler does not answer); each
job sees it through a ``JobClient`` that remembers its futures. Every status change is a
compare-and-set in the job store (``demaudit.service.run.recorder``), so a dismissal racing the
end of a job leaves one consistent record. What happens on the job's thread is in
``demaudit.service.run.job_thread``: a job that does not end successfully leaves no results
behind (its ``<id>.partial-*`` folder included). A scheduled run
(``demaudit.service.scheduling.scheduler``) carries its schedule's id and may name a baseline
run; ``on_end`` hears of every job's end (``demaudit.service.scheduling.notify`` sends the
schedules' webhooks).

Faults (causes and recovery live in ``demaudit.service.run.faults``): a failed job records its
``cause`` (``CAUSES``, from ``failure_of``). A watchdog thread
(``demaudit.service.run.watchdog``) fails a job none of whose waiting tasks finished for
``stall_timeout_s`` while no worker runs any of them ("no tile finished for N s; workers: W":
every worker gone, or none takes them; a task that runs for ever is not caught); a job whose
futures the lost scheduler cancelled fails as ``cluster-unavailable``; a job whose record cannot
be written fails with the store's error (retried until written; logged, and ``store_problem``
tells the readiness probe).

Ownership: each dispatcher is one runner instance (``host:pid:random``), written into every job
it takes; it renews a lease in the store every ``watch_interval_s``. :func:`recover_orphans`
(at start-up and at every watchdog tick) fails the unfinished jobs of instances that are gone
and removes their partial outputs; jobs of a live neighbour sharing the store are left alone.
"""

from __future__ import annotations

import datetime as dt
import logging
import os
import socket
import threading
import uuid
from collections.abc import Sequence
from concurrent.futures import ThreadPoolExecutor
from concurrent.futures import wait as wait_futures
from pathlib import Path
from typing import Any

from demaudit.service.run.cluster import ClusterConnection, ClusterUnavailableError
from demaudit.service.run.faults import (
    INTERRUPTED,
    SHUTDOWN_MESSAGE,
    StoreWriteError,
    new_instance_id,
    recover_orphans,
)
from demaudit.service.run.job_thread import EndHook, JobThreads, Runner
from demaudit.service.run.recorder import JobRecorder
from demaudit.service.run.runner import run_job
from demaudit.service.run.tile_limit import DEFAULT_TILE_TIMEOUT_S
from demaudit.service.run.watchdog import ActiveJob, check_stall
from demaudit.service.store.jobs import (
    ACCEPTED,
    DISMISSED,
    FAILED,
    RUNNING,
    JobRecord,
    JobStore,
    Lease,
    utc_now,
)
from demaudit.workers.spec import ResolvedJob

__all__ = ["PROCESS_ID", "JobDispatcher", "new_job_id"]

PROCESS_ID = "dem-audit"

log = logging.getLogger("demaudit.jobs")


def new_job_id() -> str:
    """A new job id: 32 hex digits (no dashes: the runner's task keys end in '-<job id>')."""
    return uuid.uuid4().hex


class JobDispatcher(JobThreads):
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
        tile_timeout_s: float | None = DEFAULT_TILE_TIMEOUT_S,
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
        self._tile_timeout_s = tile_timeout_s
        self._runner = runner
        self._pool = ThreadPoolExecutor(max_running_jobs, thread_name_prefix="demaudit-job")
        self._lock = threading.Lock()
        self._active: dict[str, ActiveJob] = {}
        self._closing = False
        self.stall_timeout_s = stall_timeout_s
        self.lease_s = lease_s
        self.watch_interval_s = watch_interval_s
        self.instance = instance or new_instance_id()
        self._recorder = JobRecorder(store)
        self._watch_stop = threading.Event()
        self._watcher: threading.Thread | None = None

    @property
    def cluster(self) -> ClusterConnection:
        """The shared connection to the Dask scheduler."""
        return self._cluster

    def store_problem(self) -> str | None:
        """Why the last write to the job store failed, until a later one succeeds."""
        return self._recorder.problem()

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
            active = self._active[record.job_id] = ActiveJob()
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
                    self._recorder.write(job_id, changes, only_from={ACCEPTED, RUNNING})
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
        self._recorder.retry_unrecorded()
        try:
            recover_orphans(self.store, results_dir=self.results_dir, instance=self.instance)
        except Exception as exc:  # noqa: BLE001 - reported by the probe, retried next tick
            self._recorder.note_failure(exc)

    def _renew_lease(self) -> None:
        host, pid = socket.gethostname(), os.getpid()
        expires = utc_now() + dt.timedelta(seconds=self.lease_s)
        try:
            self.store.renew_lease(Lease(self.instance, host, pid, expires))
        except Exception as exc:  # noqa: BLE001 - logged, and the readiness probe says so
            self._recorder.note_failure(exc)

    def _check_stalls(self) -> None:
        limit = self.stall_timeout_s
        if limit is None:
            return
        with self._lock:
            running = list(self._active.items())
        for job_id, active in running:
            check_stall(job_id, active, limit=limit, cluster=self._cluster)
