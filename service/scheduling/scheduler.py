"""Scheduled runs: a pure decision (:func:`due_runs`, :func:`plan`) and a thin loop around it.

::

    Scheduler.tick (every schedule_tick_s, in each API process)
      └─ acquire_lease("scheduler") ── not ours: do nothing
         for each schedule:
           plan(schedule, last run, now) ─► None          nothing due
                                         ├► Skip(slot)    claim_slot ─► record 'skipped'
                                         └► Run(slot)     claim_slot ─► resolve the spec
                                                          ─► dispatcher.submit(baseline=...)
                                                          ─► record 'submitted' (or 'failed')

Cron times, time zones and clock changes: ``demaudit.service.scheduling.cron``.

The slots of a schedule are its cron times after its creation. A tick runs the latest slot not
yet handled, and only that one however many were missed while no server ran; a slot that comes
while the previous run of its schedule is still going is skipped and recorded as skipped. With
``baseline: latest`` a run re-checks against the results of the schedule's last successful run
(a full run when there is none). Claims are compare-and-sets in the job store
(``demaudit.service.store.schedules``), so API processes sharing a store run each slot once.
"""

from __future__ import annotations

import datetime as dt
import logging
import os
import socket
import threading
import uuid
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Protocol

from demaudit.service.scheduling.cron import Clock, due_runs, missed_slots
from demaudit.service.store.jobs import (
    ACCEPTED,
    RUNNING,
    SUCCESSFUL,
    JobRecord,
    JobStore,
)
from demaudit.service.store.schedules import ScheduleRecord
from demaudit.workers import spec as job_spec
from demaudit.workers.errors import AuditError
from demaudit.workers.outputs.layout import is_result
from demaudit.workers.spec import ResolvedJob

__all__ = ["LEASE", "LastRun", "Run", "Scheduler", "Skip", "plan", "resolve_inputs"]

LEASE = "scheduler"
"""Name of the lease whose holder runs the schedules."""
REASON_LIMIT = 2000

log = logging.getLogger("demaudit.scheduler")


# --- the pure part ------------------------------------------------------------------------------


@dataclass(frozen=True)
class LastRun:
    """What the scheduler knows of a schedule's previous slot."""

    slot: dt.datetime
    """The last slot handled (run, skipped or failed)."""
    job_id: str | None = None
    """The job of the last run that started one."""
    running: bool = False
    """Whether that job is still waiting or running."""


@dataclass(frozen=True)
class Run:
    """Start a job for slot."""

    slot: dt.datetime
    missed: int = 0
    """Earlier slots that were due and are covered by this one run."""


@dataclass(frozen=True)
class Skip:
    """Record slot as skipped, with the reason."""

    slot: dt.datetime
    reason: str


def plan(schedule: ScheduleRecord, last: LastRun | None, now: dt.datetime) -> Run | Skip | None:
    """What to do for schedule at now: start a run, skip a slot (the previous run is still
    going: no overlap), or nothing."""
    slots = due_runs(schedule, last.slot if last is not None else None, now)
    if not slots:
        return None
    slot = slots[-1]
    if last is not None and last.running:
        return Skip(slot, f"the previous run (job {last.job_id}) was still running")
    after = last.slot if last is not None else schedule.created
    return Run(slot, missed=missed_slots(schedule.cron, after, slot, timezone=schedule.timezone))


# --- the thin shell -----------------------------------------------------------------------------


class Submitter(Protocol):
    """What starts jobs: ``demaudit.service.run.dispatcher.JobDispatcher``."""

    def submit(
        self,
        job: ResolvedJob,
        inputs: dict[str, Any],
        *,
        schedule_id: str | None = None,
        baseline: Path | None = None,
        owner: str | None = None,
    ) -> JobRecord: ...

    def results_path(self, job_id: str) -> Path: ...


def resolve_inputs(inputs: Mapping[str, Any], *, data_roots: Sequence[Path] | None) -> ResolvedJob:
    """A stored spec (execute-request inputs) resolved as the REST service resolves specs:
    relative paths against the first data root, every file inside the roots."""
    return job_spec.resolve_in_roots(job_spec.parse_spec(dict(inputs)), data_roots=data_roots)


class Scheduler:
    """Starts the due runs of every schedule while it holds the scheduler lease."""

    def __init__(
        self,
        store: JobStore,
        submitter: Submitter,
        *,
        resolve: Callable[[Mapping[str, Any]], ResolvedJob],
        clock: Clock,
        lease_s: float = 60.0,
        owner: str | None = None,
    ) -> None:
        self.store = store
        self.owner = owner or f"{socket.gethostname()}-{os.getpid()}-{uuid.uuid4().hex[:8]}"
        self._submitter = submitter
        self._resolve = resolve
        self._clock = clock
        self._lease_s = lease_s
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    def tick(self) -> list[tuple[str, Run | Skip]]:
        """Take or renew the lease; if held, handle every schedule's due slot. What was done."""
        now = self._clock()
        if not self.store.acquire_lease(LEASE, self.owner, now=now, ttl_s=self._lease_s):
            return []
        done: list[tuple[str, Run | Skip]] = []
        for schedule in self.store.find_schedules(limit=1_000_000):
            try:
                action = self._handle(schedule, now)
            except Exception:  # one schedule's trouble never stops the others
                log.exception("schedule %s: tick failed", schedule.schedule_id)
                continue
            if action is not None:
                done.append((schedule.schedule_id, action))
        return done

    def start(self, *, interval_s: float) -> None:
        """Tick every interval_s seconds (the first after one interval) on a daemon thread
        until stop()."""
        self._thread = threading.Thread(
            target=self._loop, args=(interval_s,), name="demaudit-scheduler", daemon=True
        )
        self._thread.start()

    def stop(self, *, timeout: float = 10.0) -> None:
        """Stop ticking and give up the lease (another process takes over at once)."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)
        try:
            self.store.release_lease(LEASE, self.owner)
        except Exception:  # noqa: BLE001 - the lease runs out by itself
            log.warning("could not release the scheduler lease", exc_info=True)

    def _loop(self, interval_s: float) -> None:
        while not self._stop.wait(interval_s):
            try:
                self.tick()
            except Exception:  # a store hiccup: try again at the next tick
                log.exception("scheduler tick failed")

    def _handle(self, schedule: ScheduleRecord, now: dt.datetime) -> Run | Skip | None:
        action = plan(schedule, self._last_run(schedule), now)
        if action is None:
            return None
        claimed = self.store.claim_slot(
            schedule.schedule_id,
            action.slot,
            previous=schedule.last_slot,
            owner=self.owner,
            lease=LEASE,
            now=now,
        )
        if claimed is None:
            return None  # another scheduler claimed it, or the lease ran out meanwhile
        if isinstance(action, Skip):
            self.store.record_run(
                schedule.schedule_id, action.slot, outcome="skipped", reason=action.reason
            )
            log.info("schedule %s: slot %s skipped: %s", schedule.name, action.slot, action.reason)
            return action
        self._start(schedule, action)
        return action

    def _start(self, schedule: ScheduleRecord, action: Run) -> None:
        slot = action.slot
        try:
            job = self._resolve(schedule.inputs)
            baseline = self._baseline(schedule) if schedule.baseline == "latest" else None
            record = self._submitter.submit(
                job,
                schedule.inputs,
                schedule_id=schedule.schedule_id,
                baseline=baseline,
                owner=schedule.owner,
            )
        except (AuditError, RuntimeError) as exc:  # the spec no longer resolves; shutting down
            reason = _clip(f"no job started: {exc}")
            self.store.record_run(schedule.schedule_id, slot, outcome="failed", reason=reason)
            log.warning("schedule %s: slot %s: %s", schedule.name, slot, reason)
            return
        except Exception:
            log.exception("schedule %s: slot %s: could not start a job", schedule.name, slot)
            reason = "no job started: internal error (details are in the server log)"
            self.store.record_run(schedule.schedule_id, slot, outcome="failed", reason=reason)
            return
        how = f"re-check against {baseline.name}" if baseline is not None else "full run"
        if action.missed:
            how += f"; caught up once for {action.missed} missed slot(s)"
        self.store.record_run(
            schedule.schedule_id, slot, outcome="submitted", job_id=record.job_id, reason=how
        )
        log.info(
            "schedule %s: slot %s: %s", schedule.name, slot, how, extra={"job_id": record.job_id}
        )

    def _last_run(self, schedule: ScheduleRecord) -> LastRun | None:
        if schedule.last_slot is None:
            return None
        job = self.store.get(schedule.last_job_id) if schedule.last_job_id else None
        running = job is not None and job.status in (ACCEPTED, RUNNING)
        return LastRun(schedule.last_slot, schedule.last_job_id, running)

    def _baseline(self, schedule: ScheduleRecord) -> Path | None:
        """The results folder of the schedule's newest successful run that still has them."""
        for run in self.store.find_runs(schedule.schedule_id, limit=100):
            job = self.store.get(run.job_id) if run.job_id else None
            if job is None or job.status != SUCCESSFUL:
                continue
            folder = self._submitter.results_path(job.job_id)
            if is_result(folder):
                return folder
        return None


def _clip(message: str) -> str:
    return message if len(message) <= REASON_LIMIT else message[: REASON_LIMIT - 3] + "..."
