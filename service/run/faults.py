"""Why jobs end badly, and who cleans up after a server process that is gone.

Causes: a failed job records one of ``CAUSES`` (:func:`failure_of` maps the exception that
ended it; ``demaudit.service.api.problems.failure_cause`` maps the cause to a problem type): bad
input,
exhausted resources, a cluster fault, an interruption, an internal error.

Recovery: each API process is a runner instance (``host:pid:random``, :func:`new_instance_id`)
written into every job it takes, with a lease in the job store that its dispatcher renews.
:func:`recover_orphans` fails the unfinished jobs of instances that are gone (no lease, a lease
that ran out, a process id on this host that no longer runs) and removes their partial outputs
(:func:`remove_outputs`); a live neighbour sharing the store keeps its jobs. Tile tasks still
running on the workers when a job ends may write into its partial folder once more: every
recovery pass (each watchdog tick) also removes the partial folders of jobs that are over
(:func:`sweep_partials`).
"""

from __future__ import annotations

import datetime as dt
import errno
import logging
import os
import shutil
import socket
import sqlite3
import uuid
from collections.abc import Callable, Mapping
from pathlib import Path

from demaudit.service.run.cluster import ClusterUnavailableError
from demaudit.service.store.jobs import (
    ACCEPTED,
    FAILED,
    FINISHED,
    RUNNING,
    JobRecord,
    JobStore,
    Lease,
    utc_now,
)
from demaudit.workers.errors import AuditError, OutputError, TileReadError
from demaudit.workers.outputs.layout import PARTIAL_SEPARATOR, leftover_patterns

__all__ = [
    "CAUSES",
    "CLUSTER",
    "INPUT",
    "INTERNAL",
    "INTERNAL_FAILURE",
    "INTERRUPTED",
    "LOST_MESSAGE",
    "RESOURCES",
    "RESTART_MESSAGE",
    "RESTART_QUEUED_MESSAGE",
    "SHUTDOWN_MESSAGE",
    "TILE_UNREADABLE",
    "StoreWriteError",
    "failure_of",
    "new_instance_id",
    "orphan_reason",
    "recover_after_restart",
    "recover_orphans",
    "remove_outputs",
    "sweep_partials",
]

log = logging.getLogger("demaudit.jobs")

RESTART_MESSAGE = "server restarted while the job ran"
RESTART_QUEUED_MESSAGE = "server restarted before the job started; submit it again"
SHUTDOWN_MESSAGE = "server shut down while the job ran"
INTERNAL_FAILURE = "internal error while running the job (details are in the server log)"
LOST_MESSAGE = "the connection to the Dask scheduler was lost while the job ran; submit it again"
MESSAGE_LIMIT = 2000

# Causes of a failed job (JobRecord.cause); demaudit.service.api.problems maps each to a problem
# type.
INPUT = "invalid-input"
"""The spec or a file it names cannot be used (bad input: fix the job, not the server)."""
TILE_UNREADABLE = "tile-unreadable"
"""A tile the job needs cannot be opened or decoded (corrupt, truncated, not heights)."""
RESOURCES = "resources-exhausted"
"""Disk full, out of memory, a worker killed repeatedly by its task."""
CLUSTER = "cluster-unavailable"
"""The Dask scheduler was lost, or no task of the job finished for the stall time."""
INTERRUPTED = "interrupted"
"""The server process running the job stopped (shut down, killed, restarted)."""
INTERNAL = "internal"
"""Anything else (details in the server log)."""
CAUSES = (INPUT, TILE_UNREADABLE, RESOURCES, CLUSTER, INTERRUPTED, INTERNAL)


class StoreWriteError(RuntimeError):
    """The job store refused a write (disk full, read-only, locked); the message names why."""


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
        for pattern in leftover_patterns(job_id):
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
    if isinstance(exc, TileReadError):
        return TILE_UNREADABLE, _clip(str(exc))
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
    if results_dir is not None:
        sweep_partials(store, results_dir)
    return failed


def sweep_partials(store: JobStore, results_dir: Path) -> list[Path]:
    """Remove the ``<id>.partial-*`` folders of jobs that are over; return them. A job's tile
    tasks that were running on the workers when its server process died (or when the job failed
    or was dismissed) finish after its outputs were removed and may write their tile into the
    partial folder again; the watchdog calls this every tick, so such a folder goes at the next.
    Folders whose name is no job of the store (a CLI run's output, say) are left alone."""
    results_dir = Path(results_dir)
    try:
        names = [e.name for e in os.scandir(results_dir) if e.is_dir(follow_symlinks=False)]
    except FileNotFoundError:  # no job wrote anything yet
        return []
    except OSError as exc:  # unreadable: nothing to sweep now, said once a tick
        log.warning("partial folders not swept: %s", exc.strerror)
        return []
    removed: list[Path] = []
    for name in names:
        job_id, sep, _ = name.partition(PARTIAL_SEPARATOR)
        if not sep:
            continue
        try:
            record = store.get(job_id)
        except Exception:  # noqa: BLE001 - a name no job can have (not UTF-8, say): not ours
            continue
        if record is not None and record.status in FINISHED:
            shutil.rmtree(results_dir / name, ignore_errors=True)
            removed.append(results_dir / name)
            log.warning("removed a partial folder written after its job ended: %s", name)
    return removed


def recover_after_restart(
    store: JobStore, *, results_dir: Path | None = None, instance: str | None = None
) -> list[str]:
    """Start-up recovery: :func:`recover_orphans` (kept under its older name)."""
    return recover_orphans(store, results_dir=results_dir, instance=instance)


def _clip(message: str) -> str:
    return message if len(message) <= MESSAGE_LIMIT else message[: MESSAGE_LIMIT - 3] + "..."
