"""The dispatcher: the life of a job from submission to its end, on worker threads.

::

    submit ──► accepted ──► running ──► successful
                  │            ├──────► failed      (bad input, cluster or store fault, a crash,
                  │            │                     no progress, a server shut-down)
                  └────────────┴──────► dismissed   (DELETE /jobs/{id}; tile tasks cancelled)

``service.runner.run_job`` is synchronous, so each job runs on a thread of a bounded pool
(``max_running_jobs``); the rest wait as ``accepted``. All jobs share one Dask client (a
``service.cluster.ClusterConnection``, made anew after a scheduler outage; submissions are
refused with ClusterUnavailableError while the scheduler does not answer); each job sees it
through a ``JobClient`` that remembers its futures. Every status change is a compare-and-set in
the job store, so a dismissal racing the end of a job leaves one consistent record. A job that
does not end successfully leaves no results behind (its ``<id>.partial-*`` folder included).
A scheduled run (``service.scheduler``) carries its schedule's id and may name a baseline run;
``on_end`` hears of every job's end (``service.notify`` sends the schedules' webhooks).

Faults: a failed job records its ``cause`` (``CAUSES``, from :func:`failure_of`). A watchdog
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
import errno
import logging
import os
import shutil
import socket
import sqlite3
import threading
import uuid
from collections.abc import Callable, Collection, Mapping, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from concurrent.futures import wait as wait_futures
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Protocol

from service.cluster import ClusterConnection, ClusterUnavailableError, JobClient
from service.jobstore import (
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
from service.runner import UNAUDITED, JobDismissedError, run_job
from workers.errors import AuditError, OutputError
from workers.spec import ResolvedJob

__all__ = [
    "CAUSES",
    "CLUSTER",
    "INPUT",
    "INTERNAL",
    "INTERRUPTED",
    "PROCESS_ID",
    "RESOURCES",
    "RESTART_MESSAGE",
    "EndHook",
    "JobDispatcher",
    "Runner",
    "StoreWriteError",
    "current_job_id",
    "failure_of",
    "new_instance_id",
    "new_job_id",
    "recover_after_restart",
    "recover_orphans",
    "remove_outputs",
]

PROCESS_ID = "dem-audit"
RESTART_MESSAGE = "server restarted while the job ran"
RESTART_QUEUED_MESSAGE = "server restarted before the job started; submit it again"
SHUTDOWN_MESSAGE = "server shut down while the job ran"
INTERNAL_FAILURE = "internal error while running the job (details are in the server log)"
LOST_MESSAGE = "the connection to the Dask scheduler was lost while the job ran; submit it again"
MESSAGE_LIMIT = 2000

# Causes of a failed job (JobRecord.cause); service.problems maps each to a problem type.
INPUT = "invalid-input"
"""The spec or a file it names cannot be used (bad input: fix the job, not the server)."""
RESOURCES = "resources-exhausted"
"""Disk full, out of memory, a worker killed repeatedly by its task."""
CLUSTER = "cluster-unavailable"
"""The Dask scheduler was lost, or no task of the job finished for the stall time."""
INTERRUPTED = "interrupted"
"""The server process running the job stopped (shut down, killed, restarted)."""
INTERNAL = "internal"
"""Anything else (details in the server log)."""
CAUSES = (INPUT, RESOURCES, CLUSTER, INTERRUPTED, INTERNAL)

current_job_id: contextvars.ContextVar[str | None] = contextvars.ContextVar(
    "current_job_id", default=None
)
"""The job whose work the current thread does (read by the JSON log formatter)."""

log = logging.getLogger("demaudit.jobs")


class StoreWriteError(RuntimeError):
    """The job store refused a write (disk full, read-only, locked); the message names why."""


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


_HERE: set[str] = set()
"""Runner instances made in this process (several apps in one process, as in tests, are alive
together although they share host and pid)."""


def new_instance_id() -> str:
    """A new runner instance of this process: ``host:pid:8 random hex digits``."""
    instance = f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:8]}"
    _HERE.add(instance)
    return instance


def remove_outputs(results_dir: Path, job_id: str) -> None:
    """Remove a job's output folder and what a run left beside it (``<id>.partial-*``,
    ``<id>.replaced-*``)."""
    results_dir = Path(results_dir)
    shutil.rmtree(results_dir / job_id, ignore_errors=True)
    if results_dir.is_dir():
        for pattern in (f"{job_id}.partial-*", f"{job_id}.replaced-*"):
            for leftover in results_dir.glob(pattern):
                shutil.rmtree(leftover, ignore_errors=True)


# --- failure causes ---------------------------------------------------------------------------


def _disk_full(exc: BaseException) -> bool:
    for err in _chain(exc):
        if isinstance(err, OSError) and err.errno in (errno.ENOSPC, errno.EDQUOT):
            return True
        if isinstance(err, sqlite3.Error) and "full" in str(err):
            return True
        if "No space left on device" in str(err) or "Disk quota exceeded" in str(err):
            return True
    return False


def _chain(exc: BaseException) -> list[BaseException]:
    seen: list[BaseException] = []
    current: BaseException | None = exc
    while current is not None and current not in seen:
        seen.append(current)
        current = current.__cause__ or current.__context__
    return seen


_CLUSTER_ERRORS = frozenset(
    {"CancelledError", "FutureCancelledError", "CommClosedError", "ClusterUnavailableError"}
)


def failure_of(exc: BaseException) -> tuple[str, str]:
    """(cause, message) of the exception that ended a job; the message says what to do and
    never carries a traceback (an internal error's details go to the log only)."""
    name = type(exc).__name__
    if isinstance(exc, MemoryError):
        return RESOURCES, "out of memory while running the job"
    if _disk_full(exc):
        text = str(exc) if isinstance(exc, AuditError | StoreWriteError) else f"{exc}"
        return RESOURCES, _clip(f"disk full: {text}")
    if isinstance(exc, StoreWriteError):
        return INTERNAL, _clip(str(exc))
    if isinstance(exc, OutputError):
        return INTERNAL, _clip(str(exc))  # the server's results folder: not the caller's input
    if isinstance(exc, AuditError):
        return INPUT, _clip(str(exc))
    if name == "KilledWorker":
        return RESOURCES, _clip(
            f"a task of the job ended its worker process repeatedly (most often: out of memory, "
            f"see DEMAUDIT_WORKER_MEMORY_LIMIT): {exc}"
        )
    if name in _CLUSTER_ERRORS or isinstance(exc, ClusterUnavailableError):
        return CLUSTER, _clip(f"the Dask cluster failed the job: {name}: {exc}")
    return INTERNAL, INTERNAL_FAILURE


# --- recovery ---------------------------------------------------------------------------------


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def orphan_reason(
    record: JobRecord,
    leases: Mapping[str, Lease],
    *,
    instance: str | None,
    now: dt.datetime,
    host: str,
    pid: int,
    pid_alive: Callable[[int], bool] = _pid_alive,
) -> str | None:
    """Why record's runner is gone (None when it may still run the job): no runner recorded, no
    lease, a process id on this host that no longer runs (or is ours: a restarted container),
    or a lease that ran out."""
    owner = record.runner_instance
    if owner is not None and owner == instance:
        return None
    if owner is None:
        return "recorded before runner instances"
    lease = leases.get(owner)
    if lease is None:
        return "its server process holds no lease"
    if lease.host == host and not pid_alive(lease.pid):
        return "its server process no longer runs"
    if lease.host == host and lease.pid == pid and owner not in _HERE:
        return "its server process no longer runs (this process has its id now)"
    if lease.expires < now:
        return "its server process stopped renewing its lease"
    return None


def recover_orphans(
    store: JobStore,
    *,
    results_dir: Path | None = None,
    instance: str | None = None,
    now: dt.datetime | None = None,
) -> list[str]:
    """Fail the unfinished jobs whose server process is gone (see orphan_reason) and remove
    their partial outputs; return their ids. The jobs of ``instance`` (this process) and of live
    neighbours are left alone. Jobs are not resumed: their tile tasks died with the old
    process's Dask client, and a new run would re-read data that may have changed since."""
    now = now or utc_now()
    leases = {lease.instance: lease for lease in store.leases()}
    host, pid = socket.gethostname(), os.getpid()
    unfinished = store.find(statuses={RUNNING, ACCEPTED}, limit=1_000_000)
    failed: list[str] = []
    for record in unfinished:
        reason = orphan_reason(record, leases, instance=instance, now=now, host=host, pid=pid)
        if reason is None:
            continue
        message = RESTART_MESSAGE if record.status == RUNNING else RESTART_QUEUED_MESSAGE
        changes = {"status": FAILED, "message": message, "finished": now, "cause": INTERRUPTED}
        if store.update(record.job_id, changes, only_from={record.status}) is None:
            continue  # it ended meanwhile
        if results_dir is not None:
            remove_outputs(results_dir, record.job_id)
        failed.append(record.job_id)
        log.warning("job marked failed: %s", reason, extra={"job_id": record.job_id})
    return failed


def recover_after_restart(
    store: JobStore, *, results_dir: Path | None = None, instance: str | None = None
) -> list[str]:
    """Start-up recovery: :func:`recover_orphans` (kept under its older name)."""
    return recover_orphans(store, results_dir=results_dir, instance=instance)


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


def _clip(message: str) -> str:
    return message if len(message) <= MESSAGE_LIMIT else message[: MESSAGE_LIMIT - 3] + "..."
