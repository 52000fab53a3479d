"""The schedules part of the job store: schedules, their handled slots and leases.

:class:`ScheduleStore` is the contract, which ``demaudit.service.store.jobs.JobStore`` extends;
the job stores get it from :class:`MemorySchedules` and
``demaudit.service.store.sqlite_schedules.SqliteSchedules`` (one lock, one connection shared
with the job records).

Several API processes may share one store for scheduling. Two compare-and-sets keep a slot from
running twice::

    acquire_lease("scheduler", owner, now, ttl)   take or renew: free, ours, or expired
    claim_slot(schedule, slot, previous, owner)   last_slot: previous -> slot, only while owner
                                                  holds an unexpired lease; records the run

Only the lease holder plans runs, and even a holder that lost its lease unawares (a long pause)
cannot claim: the claim checks the lease and the schedule's last slot in one statement.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import threading
from dataclasses import dataclass
from typing import Any, Literal, Protocol

__all__ = [
    "DEFAULT_TIMEZONE",
    "MemorySchedules",
    "NotifyWhen",
    "RunOutcome",
    "ScheduleRecord",
    "ScheduleRun",
    "ScheduleStore",
]

DEFAULT_TIMEZONE = "UTC"
"""The time zone of a schedule that names none (every schedule made before zones existed)."""
NotifyWhen = Literal["regressions", "always"]
"""When a schedule's webhook is called: after a run that found regressions, or after every run."""
RunOutcome = Literal["claimed", "submitted", "skipped", "failed"]
"""What became of one slot: claimed (a job is being submitted), submitted (a job runs it),
skipped (the previous run was still going) or failed (no job could be started)."""


@dataclass(frozen=True)
class ScheduleRecord:
    """A job spec run on a cron schedule (its cron read on the wall clock of its time zone;
    the times kept here, created and last_slot, are UTC)."""

    schedule_id: str
    name: str
    cron: str
    """Five-field cron expression (or @daily and kin), evaluated in timezone."""
    inputs: dict[str, Any]
    """The job spec, as in an execute request (JSON-compatible)."""
    created: dt.datetime
    """No slot at or before this time runs."""
    timezone: str = DEFAULT_TIMEZONE
    """IANA time zone whose wall clock the cron follows, e.g. Europe/Oslo for 02:00 local time
    in winter and summer alike (see ``demaudit.service.scheduling.scheduler`` for the nights the
    clocks change)."""
    webhook: str | None = None
    notify: NotifyWhen = "regressions"
    baseline: Literal["latest"] | None = None
    """'latest': each run re-checks against the schedule's last successful run."""
    base_url: str | None = None
    """The API's URL the schedule was created through (for links in notifications)."""
    last_slot: dt.datetime | None = None
    """The last slot claimed (run, skipped or failed)."""
    last_job_id: str | None = None
    """The job of the last slot that started one."""
    owner: str | None = None
    """The principal that created the schedule (its runs are that principal's jobs); None for
    a schedule made before owners were recorded (visible to admins only)."""
    webhook_secret: str | None = None
    """Key of the HMAC-SHA256 signature of each webhook delivery (None: deliveries unsigned,
    a schedule made before signatures). Never shown by the API after creation."""


@dataclass(frozen=True)
class ScheduleRun:
    """One handled slot of a schedule."""

    schedule_id: str
    slot: dt.datetime
    outcome: RunOutcome
    owner: str
    """The scheduler (process) that claimed the slot."""
    recorded: dt.datetime
    job_id: str | None = None
    reason: str = ""


class ScheduleStore(Protocol):
    """Where schedules, their runs and leases live. Every method is thread-safe."""

    def add_schedule(self, schedule: ScheduleRecord) -> None:
        """Store a new schedule (its schedule_id must be new)."""
        ...

    def get_schedule(self, schedule_id: str) -> ScheduleRecord | None:
        """The schedule, or None."""
        ...

    def find_schedules(
        self, *, limit: int = 100, offset: int = 0, owner: str | None = None
    ) -> list[ScheduleRecord]:
        """Schedules, oldest first (only owner's when owner is given)."""
        ...

    def count_schedules(self, *, owner: str | None = None) -> int:
        """How many schedules there are (of owner when given)."""
        ...

    def remove_schedule(self, schedule_id: str) -> bool:
        """Delete a schedule and its run rows (its jobs stay); whether it existed."""
        ...

    def acquire_lease(self, name: str, owner: str, *, now: dt.datetime, ttl_s: float) -> bool:
        """Take or renew the lease name for owner until now + ttl_s; False while another owner
        holds an unexpired lease (compare-and-set)."""
        ...

    def release_lease(self, name: str, owner: str) -> None:
        """Give up the lease if owner holds it."""
        ...

    def claim_slot(
        self,
        schedule_id: str,
        slot: dt.datetime,
        *,
        previous: dt.datetime | None,
        owner: str,
        lease: str,
        now: dt.datetime,
    ) -> ScheduleRun | None:
        """If the schedule's last slot is still previous and owner holds lease at now: set it
        to slot and record a 'claimed' run, returned; else None (someone else got there)."""
        ...

    def record_run(
        self,
        schedule_id: str,
        slot: dt.datetime,
        *,
        outcome: RunOutcome,
        job_id: str | None = None,
        reason: str = "",
    ) -> None:
        """Record what became of a claimed slot (a job id also becomes the last job)."""
        ...

    def find_runs(self, schedule_id: str, *, limit: int = 20) -> list[ScheduleRun]:
        """The schedule's handled slots, newest first."""
        ...


def utc_now() -> dt.datetime:
    now = dt.datetime.now(dt.UTC)
    return now.replace(microsecond=now.microsecond // 1000 * 1000)


class MemorySchedules:
    """Schedules in dicts (mixin of ``MemoryJobStore``: call ``_open_schedules`` in __init__)."""

    _lock: threading.Lock

    def _open_schedules(self) -> None:
        self._schedules: dict[str, ScheduleRecord] = {}
        self._runs: dict[tuple[str, dt.datetime], ScheduleRun] = {}
        self._leases: dict[str, tuple[str, dt.datetime]] = {}

    def add_schedule(self, schedule: ScheduleRecord) -> None:
        with self._lock:
            if schedule.schedule_id in self._schedules:
                raise KeyError(f"schedule {schedule.schedule_id} exists")
            self._schedules[schedule.schedule_id] = schedule

    def get_schedule(self, schedule_id: str) -> ScheduleRecord | None:
        with self._lock:
            return self._schedules.get(schedule_id)

    def find_schedules(
        self, *, limit: int = 100, offset: int = 0, owner: str | None = None
    ) -> list[ScheduleRecord]:
        with self._lock:
            chosen = sorted(
                (s for s in self._schedules.values() if owner is None or s.owner == owner),
                key=lambda s: (s.created, s.schedule_id),
            )
        return chosen[offset : offset + limit]

    def count_schedules(self, *, owner: str | None = None) -> int:
        with self._lock:
            return sum(1 for s in self._schedules.values() if owner is None or s.owner == owner)

    def remove_schedule(self, schedule_id: str) -> bool:
        with self._lock:
            for key in [k for k in self._runs if k[0] == schedule_id]:
                del self._runs[key]
            return self._schedules.pop(schedule_id, None) is not None

    def acquire_lease(self, name: str, owner: str, *, now: dt.datetime, ttl_s: float) -> bool:
        with self._lock:
            holder = self._leases.get(name)
            if holder is not None and holder[0] != owner and holder[1] > now:
                return False
            self._leases[name] = (owner, now + dt.timedelta(seconds=ttl_s))
            return True

    def release_lease(self, name: str, owner: str) -> None:
        with self._lock:
            holder = self._leases.get(name)
            if holder is not None and holder[0] == owner:
                del self._leases[name]

    def claim_slot(
        self,
        schedule_id: str,
        slot: dt.datetime,
        *,
        previous: dt.datetime | None,
        owner: str,
        lease: str,
        now: dt.datetime,
    ) -> ScheduleRun | None:
        with self._lock:
            schedule = self._schedules.get(schedule_id)
            holder = self._leases.get(lease)
            if schedule is None or schedule.last_slot != previous:
                return None
            if holder is None or holder[0] != owner or holder[1] <= now:
                return None
            self._schedules[schedule_id] = dataclasses.replace(schedule, last_slot=slot)
            run = ScheduleRun(schedule_id, slot, "claimed", owner, utc_now())
            self._runs[(schedule_id, slot)] = run
            return run

    def record_run(
        self,
        schedule_id: str,
        slot: dt.datetime,
        *,
        outcome: RunOutcome,
        job_id: str | None = None,
        reason: str = "",
    ) -> None:
        with self._lock:
            run = self._runs.get((schedule_id, slot))
            if run is None:
                return
            self._runs[(schedule_id, slot)] = dataclasses.replace(
                run, outcome=outcome, job_id=job_id, reason=reason, recorded=utc_now()
            )
            schedule = self._schedules.get(schedule_id)
            if schedule is not None and job_id is not None:
                self._schedules[schedule_id] = dataclasses.replace(schedule, last_job_id=job_id)

    def find_runs(self, schedule_id: str, *, limit: int = 20) -> list[ScheduleRun]:
        with self._lock:
            runs = [r for k, r in self._runs.items() if k[0] == schedule_id]
        runs.sort(key=lambda r: r.slot, reverse=True)
        return runs[:limit]
