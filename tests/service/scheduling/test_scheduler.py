"""The scheduler: the pure decision with a frozen clock, the loop on fake jobs, and the lease
that keeps two schedulers on one SQLite file from running a slot twice."""

from __future__ import annotations

import datetime as dt
import random
import threading
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import pytest
from croniter import croniter
from hypothesis import given, settings
from hypothesis import strategies as st

from demaudit.service.scheduling.cron import (
    check_cron,
    check_timezone,
    due_runs,
    latest_slot,
    next_slot,
)
from demaudit.service.scheduling.scheduler import LEASE, LastRun, Run, Scheduler, Skip, plan
from demaudit.service.store.jobs import (
    ACCEPTED,
    RUNNING,
    SUCCESSFUL,
    JobRecord,
    JobStore,
    MemoryJobStore,
    ScheduleRecord,
)
from demaudit.service.store.sqlite_jobs import SqliteJobStore
from demaudit.workers.errors import SpecError

UTC = dt.UTC


def at(day: int, hour: int = 0, minute: int = 0, second: int = 0) -> dt.datetime:
    """A time in November 2026, UTC (2 November is a Monday)."""
    return dt.datetime(2026, 11, day, hour, minute, second, tzinfo=UTC)


def schedule(cron: str = "0 2 * * *", created: dt.datetime | None = None, **extra: Any):
    return ScheduleRecord(
        schedule_id=extra.pop("schedule_id", "s1"),
        name="nightly",
        cron=cron,
        inputs={"name": "unit-job"},
        created=created or at(1, 12),
        **extra,
    )


# --- due_runs with a frozen clock -------------------------------------------------------------


@pytest.mark.parametrize(
    ("cron", "created", "last_run", "now", "due"),
    [
        # nightly at 02:00: nothing before the first slot, the slot itself, and later that hour
        ("0 2 * * *", at(1, 12), None, at(2, 1, 59, 59), []),
        ("0 2 * * *", at(1, 12), None, at(2, 2), [at(2, 2)]),
        ("0 2 * * *", at(1, 12), None, at(2, 2, 30), [at(2, 2)]),
        ("0 2 * * *", at(1, 12), at(2, 2), at(2, 23, 59), []),
        ("0 2 * * *", at(1, 12), at(2, 2), at(3, 2), [at(3, 2)]),
        # every 15 minutes
        ("*/15 * * * *", at(1, 10, 7), None, at(1, 10, 14, 59), []),
        ("*/15 * * * *", at(1, 10, 7), None, at(1, 10, 15), [at(1, 10, 15)]),
        ("*/15 * * * *", at(1, 10, 7), at(1, 10, 15), at(1, 10, 29), []),
        # weekdays at 06:30: created on Friday after the slot, nothing on the weekend
        ("30 6 * * 1-5", at(6, 7), None, at(8, 23), []),
        ("30 6 * * 1-5", at(6, 7), None, at(9, 6, 30), [at(9, 6, 30)]),
        # aliases and monthly
        ("@hourly", at(1, 10, 30), None, at(1, 11, 0, 1), [at(1, 11)]),
        ("0 0 1 * *", at(1, 0, 0, 1), None, at(30, 23, 59), []),
        (
            "0 0 1 * *",
            at(1, 0, 0, 1),
            None,
            dt.datetime(2026, 12, 1, tzinfo=UTC),
            [dt.datetime(2026, 12, 1, tzinfo=UTC)],
        ),
    ],
)
def test_due_runs_at_the_cron_times(cron, created, last_run, now, due):
    assert due_runs(schedule(cron, created), last_run, now) == due


def test_no_run_before_the_first_slot_after_creation():
    """A schedule created at 02:00 exactly does not run that slot: its first is the next night."""
    created_at_slot = schedule("0 2 * * *", at(2, 2))
    assert due_runs(created_at_slot, None, at(2, 2)) == []
    assert due_runs(created_at_slot, None, at(3, 1, 59)) == []
    assert due_runs(created_at_slot, None, at(3, 2)) == [at(3, 2)]


def test_missed_runs_are_caught_up_once():
    """Three nights down: one run for the latest slot, and it says how many it covers."""
    nightly = schedule("0 2 * * *", at(1, 12))
    assert due_runs(nightly, at(2, 2), at(5, 3)) == [at(5, 2)]
    action = plan(nightly, LastRun(at(2, 2), "job-1", running=False), at(5, 3))
    assert action == Run(at(5, 2), missed=2)
    # once that slot is handled, nothing more is due until the next night
    assert due_runs(nightly, at(5, 2), at(5, 23)) == []


def test_a_slot_is_skipped_while_the_previous_run_is_still_running():
    nightly = schedule()
    running = LastRun(at(2, 2), "job-1", running=True)
    skip = plan(nightly, running, at(3, 2))
    assert isinstance(skip, Skip) and skip.slot == at(3, 2)
    assert "job-1" in skip.reason and "still running" in skip.reason
    assert plan(nightly, LastRun(at(2, 2), "job-1", running=False), at(3, 2)) == Run(at(3, 2))
    assert plan(nightly, running, at(2, 23)) is None  # nothing due: nothing to skip


def test_the_first_run_plans_without_a_last_run():
    assert plan(schedule(), None, at(2, 2, 5)) == Run(at(2, 2))
    assert plan(schedule(), None, at(2, 1)) is None


CRONS = ["0 2 * * *", "*/7 * * * *", "15 */3 * * *", "0 0 * * 0", "30 6 * * 1-5", "@daily"]


@settings(max_examples=200, deadline=None)
@given(
    cron=st.sampled_from(CRONS),
    created=st.datetimes(
        min_value=dt.datetime(2026, 1, 1),
        max_value=dt.datetime(2026, 12, 1),
        timezones=st.just(UTC),
    ),
    wait=st.timedeltas(min_value=dt.timedelta(0), max_value=dt.timedelta(days=20)),
)
def test_due_runs_gives_the_latest_cron_time_after_creation(cron, created, wait):
    now = created + wait
    due = due_runs(schedule(cron, created), None, now)
    assert len(due) <= 1
    latest = latest_slot(cron, now)
    assert latest is not None and latest <= now
    assert croniter.match(cron, latest)
    assert croniter(cron, latest).get_next(dt.datetime) > now  # nothing later is due
    assert due == ([latest] if latest > created else [])


@pytest.mark.parametrize("good", ["0 2 * * *", " 0  2 * * * ", "*/5 * * * 1-5", "@daily"])
def test_check_cron_accepts_five_fields_and_aliases(good):
    assert check_cron(good) == " ".join(good.split())


@pytest.mark.parametrize(
    ("bad", "why"),
    [
        ("0 2 * *", "five fields"),
        ("0 0 2 * * *", "five fields"),  # seconds are not for nightly checks
        ("61 2 * * *", "not a valid"),
        ("every night", "five fields"),
        ("@reboot", "alias"),
        ("0 0 31 2 *", "never"),
    ],
)
def test_check_cron_refuses_with_the_reason(bad, why):
    with pytest.raises(ValueError, match=why):
        check_cron(bad)


def test_naive_times_are_refused():
    with pytest.raises(ValueError, match="timezone"):
        due_runs(schedule(), None, dt.datetime(2026, 11, 2, 2))


# --- time zones: the cron read on a local wall clock ----------------------------------------------
# The expected UTC instants come from the standard library's zoneinfo (the IANA tz database),
# computed independently of croniter, which the scheduler uses.

OSLO = ZoneInfo("Europe/Oslo")


def ticked(
    sched: ScheduleRecord, start: dt.datetime, end: dt.datetime, every: dt.timedelta
) -> list[Run]:
    """The runs the scheduler starts for sched when it ticks every `every` from start to end,
    passing the last slot run on as the Scheduler does (each run ends before the next tick)."""
    runs: list[Run] = []
    last: LastRun | None = None
    now = start
    while now <= end:
        action = plan(sched, last, now)
        if action is not None:
            assert isinstance(action, Run)
            runs.append(action)
            last = LastRun(action.slot, f"job-{len(runs)}")
        now += every
    return runs


@pytest.mark.parametrize(("month", "utc_hour"), [(1, 1), (7, 0)])
def test_a_0200_schedule_in_oslo_follows_daylight_saving_time(month, utc_hour):
    """02:00 in Europe/Oslo is 01:00 UTC in January (CET, UTC+1) and 00:00 UTC in July (CEST,
    UTC+2): the schedule is due at that UTC instant, not before, and its slot is a UTC time."""
    # reference: the IANA tz database via zoneinfo
    expected = dt.datetime(2027, month, 15, 2, 0, tzinfo=ZoneInfo("Europe/Oslo")).astimezone(UTC)
    assert expected == dt.datetime(2027, month, 15, utc_hour, 0, tzinfo=UTC)
    created = dt.datetime(2027, month, 14, 12, 0, tzinfo=UTC)
    nightly = schedule("0 2 * * *", created, timezone="Europe/Oslo")
    assert due_runs(nightly, None, expected - dt.timedelta(seconds=1)) == []
    assert due_runs(nightly, None, expected) == [expected]
    assert due_runs(nightly, None, expected + dt.timedelta(hours=5)) == [expected]
    assert due_runs(nightly, None, expected)[0].tzinfo is UTC
    assert next_slot("0 2 * * *", created, timezone="Europe/Oslo") == expected
    assert latest_slot("0 2 * * *", expected, timezone="Europe/Oslo") == expected


def test_the_spring_forward_night_runs_a_skipped_time_once_when_the_clocks_jump():
    """Europe/Oslo, 28 March 2027: the clocks jump from 02:00 CET to 03:00 CEST, so 02:30 does
    not exist that night. A daily 02:30 schedule ticked every five minutes from the evening
    before to the morning after next runs once that night, at 03:00 CEST (01:00 UTC, the moment
    of the jump, as cron runs a skipped time), and once the next night at 02:30 CEST (00:30
    UTC): no run doubled, none lost, none counted as missed, no error."""
    # reference: the IANA tz database via zoneinfo; 02:30 that night reads back as 03:30
    skipped = dt.datetime(2027, 3, 28, 2, 30, tzinfo=OSLO)
    assert skipped.astimezone(UTC).astimezone(OSLO).time() == dt.time(3, 30)
    jump = dt.datetime(2027, 3, 28, 3, 0, tzinfo=OSLO).astimezone(UTC)
    next_night = dt.datetime(2027, 3, 29, 2, 30, tzinfo=OSLO).astimezone(UTC)
    assert (jump.hour, next_night.hour, next_night.minute) == (1, 0, 30)
    daily = schedule("30 2 * * *", dt.datetime(2027, 3, 27, 12, tzinfo=UTC), timezone="Europe/Oslo")
    start, end = dt.datetime(2027, 3, 27, 18, tzinfo=UTC), dt.datetime(2027, 3, 29, 12, tzinfo=UTC)
    assert ticked(daily, start, end, dt.timedelta(minutes=5)) == [Run(jump), Run(next_night)]


def test_the_fall_back_night_runs_a_repeated_time_once():
    """Europe/Oslo, 31 October 2027: the clocks go back from 03:00 CEST to 02:00 CET, so 02:30
    comes twice, at 00:30 and at 01:30 UTC. A daily 02:30 schedule ticked every five minutes
    runs once that night, at the first 02:30 (00:30 UTC); the second is no slot (not run, not
    counted as missed). The next night it runs at 02:30 CET (01:30 UTC)."""
    # reference: the IANA tz database via zoneinfo (fold=1 is the second 02:30)
    first = dt.datetime(2027, 10, 31, 2, 30, tzinfo=OSLO).astimezone(UTC)
    second = dt.datetime(2027, 10, 31, 2, 30, fold=1, tzinfo=OSLO).astimezone(UTC)
    next_night = dt.datetime(2027, 11, 1, 2, 30, tzinfo=OSLO).astimezone(UTC)
    assert (first.hour, second - first) == (0, dt.timedelta(hours=1))
    daily = schedule(
        "30 2 * * *", dt.datetime(2027, 10, 30, 12, tzinfo=UTC), timezone="Europe/Oslo"
    )
    start, end = dt.datetime(2027, 10, 30, 18, tzinfo=UTC), dt.datetime(2027, 11, 1, 12, tzinfo=UTC)
    assert ticked(daily, start, end, dt.timedelta(minutes=5)) == [Run(first), Run(next_night)]
    # a server that was down all night still runs the first 02:30 once, on waking after both
    assert due_runs(daily, None, second + dt.timedelta(minutes=10)) == [first]
    assert due_runs(daily, first, second + dt.timedelta(minutes=10)) == []


def test_an_hourly_schedule_follows_real_time_on_the_fall_back_night():
    """With * in the hour field a schedule runs by real time, as cron does: hourly in
    Europe/Oslo on 31 October 2027 runs at both 02:00 (00:00 and 01:00 UTC), every UTC hour."""
    start = dt.datetime(2027, 10, 30, 22, 30, tzinfo=UTC)
    hourly = schedule("0 * * * *", start, timezone="Europe/Oslo")
    runs = ticked(hourly, start, start + dt.timedelta(hours=6), dt.timedelta(minutes=5))
    assert [r.slot for r in runs] == [start + dt.timedelta(minutes=30 + 60 * n) for n in range(6)]
    assert {r.missed for r in runs} == {0}


def test_a_schedule_without_a_zone_is_read_in_utc():
    plain = schedule("0 2 * * *")
    assert plain.timezone == "UTC"
    assert due_runs(plain, None, at(2, 2, 30)) == [at(2, 2)]
    assert due_runs(schedule("0 2 * * *", timezone="UTC"), None, at(2, 2, 30)) == [at(2, 2)]


@settings(max_examples=150, deadline=None)
@given(
    cron=st.sampled_from(CRONS),
    now=st.datetimes(
        min_value=dt.datetime(2026, 1, 1),
        max_value=dt.datetime(2027, 12, 31),
        timezones=st.just(UTC),
    ),
)
def test_the_default_zone_gives_the_utc_cron_times_of_before(cron, now):
    """Without a zone the slots are croniter's UTC times exactly, as the scheduler computed
    them before schedules had zones."""
    before = croniter(cron, now + dt.timedelta(microseconds=1)).get_prev(dt.datetime)
    assert latest_slot(cron, now) == before and latest_slot(cron, now).tzinfo is UTC
    assert next_slot(cron, now) == croniter(cron, now).get_next(dt.datetime)


@pytest.mark.parametrize(
    "good", ["UTC", "Europe/Oslo", "America/Argentina/Buenos_Aires", " Asia/Kolkata "]
)
def test_check_timezone_accepts_iana_names(good):
    assert check_timezone(good) == good.strip()


@pytest.mark.parametrize(
    "bad", ["Mars/Olympus", "", "Europe", "Europe/", "../etc/passwd", "/etc/localtime", "CET+1"]
)
def test_check_timezone_refuses_unknown_zones_naming_them(bad):
    with pytest.raises(ValueError, match="unknown time zone") as refused:
        check_timezone(bad)
    assert repr(bad) in str(refused.value)


def test_check_timezone_refuses_the_servers_localtime():
    with pytest.raises(ValueError, match="server"):
        check_timezone("localtime")


# --- the loop on fake jobs ------------------------------------------------------------------------


class FrozenClock:
    """A clock that moves only when told."""

    def __init__(self, now: dt.datetime) -> None:
        self.now = now
        self._lock = threading.Lock()

    def __call__(self) -> dt.datetime:
        with self._lock:
            return self.now

    def advance(self, **delta: float) -> None:
        with self._lock:
            self.now += dt.timedelta(**delta)

    def set(self, now: dt.datetime) -> None:
        with self._lock:
            self.now = now


@dataclass
class FakeSubmitter:
    """Records each job it is given as accepted in the store; the test ends them (or, with
    finish_at_once, they succeed at once)."""

    store: JobStore
    results_dir: Path
    finish_at_once: bool = False
    submitted: list[tuple[str, str | None, Path | None]] = field(default_factory=list)

    def submit(self, job, inputs, *, schedule_id=None, baseline=None, owner=None) -> JobRecord:
        job_id = f"{random.getrandbits(128):032x}"
        now = dt.datetime.now(UTC)
        record = JobRecord(job_id, "dem-audit", ACCEPTED, "m", now, now, inputs=inputs,
                           schedule_id=schedule_id, owner=owner)  # fmt: skip
        self.store.add(record)
        if self.finish_at_once:
            self.store.update(job_id, {"status": SUCCESSFUL})
        self.submitted.append((job_id, schedule_id, baseline))
        return record

    def results_path(self, job_id: str) -> Path:
        return self.results_dir / job_id

    def finish(self, job_id: str, *, with_results: bool = True) -> None:
        self.store.update(job_id, {"status": SUCCESSFUL})
        if with_results:
            (self.results_path(job_id) / "results.zarr").mkdir(parents=True)
            (self.results_path(job_id) / "summary.json").write_text("{}")


def make_scheduler(store: JobStore, clock: FrozenClock, tmp_path: Path, **kw: Any):
    submitter = FakeSubmitter(store, tmp_path / "results", kw.pop("finish_at_once", False))
    scheduler = Scheduler(
        store,
        submitter,
        resolve=kw.pop("resolve", lambda inputs: object()),
        clock=clock,
        lease_s=kw.pop("lease_s", 60.0),
        owner=kw.pop("owner", "here"),
    )
    return scheduler, submitter


@pytest.fixture
def clock() -> FrozenClock:
    return FrozenClock(at(1, 12))


def test_the_loop_runs_each_slot_once_and_catches_up_once(clock, tmp_path):
    store = MemoryJobStore()
    store.add_schedule(schedule("0 2 * * *", clock()))
    scheduler, jobs = make_scheduler(store, clock, tmp_path)
    assert scheduler.tick() == []
    clock.set(at(2, 2, 0, 10))
    assert scheduler.tick() == [("s1", Run(at(2, 2)))]
    assert scheduler.tick() == []  # same slot, same minute: nothing more
    jobs.finish(jobs.submitted[0][0])
    clock.set(at(5, 2, 30))  # three nights later (the server was down for two of them)
    assert scheduler.tick() == [("s1", Run(at(5, 2), missed=2))]
    assert len(jobs.submitted) == 2
    runs = store.find_runs("s1")
    assert [(r.slot, r.outcome) for r in runs] == [(at(5, 2), "submitted"), (at(2, 2), "submitted")]
    assert runs[0].reason == "full run; caught up once for 2 missed slot(s)"
    assert store.get(jobs.submitted[1][0]).schedule_id == "s1"


def test_the_loop_skips_a_slot_while_the_previous_run_goes_on(clock, tmp_path):
    store = MemoryJobStore()
    store.add_schedule(schedule("0 2 * * *", clock()))
    scheduler, jobs = make_scheduler(store, clock, tmp_path)
    clock.set(at(2, 2))
    scheduler.tick()
    first = jobs.submitted[0][0]
    store.update(first, {"status": RUNNING})
    clock.set(at(3, 2))
    assert scheduler.tick() == [
        ("s1", Skip(at(3, 2), f"the previous run (job {first}) was still running"))
    ]
    assert len(jobs.submitted) == 1
    skipped = store.find_runs("s1")[0]
    assert (skipped.slot, skipped.outcome, skipped.job_id) == (at(3, 2), "skipped", None)
    jobs.finish(first)
    clock.set(at(4, 2))
    assert scheduler.tick() == [("s1", Run(at(4, 2)))]
    assert len(jobs.submitted) == 2


def test_baseline_latest_rechecks_against_the_last_successful_run(clock, tmp_path):
    store = MemoryJobStore()
    store.add_schedule(schedule("0 2 * * *", clock(), baseline="latest"))
    scheduler, jobs = make_scheduler(store, clock, tmp_path)
    for day in (2, 3, 4, 5):
        clock.set(at(day, 2))
        scheduler.tick()
        job_id = jobs.submitted[-1][0]
        if day == 2:
            jobs.finish(job_id)  # successful, results kept
        elif day == 3:
            jobs.finish(job_id, with_results=False)  # successful, results since removed
        elif day == 4:
            store.update(job_id, {"status": "failed"})
    baselines = [b for _, _, b in jobs.submitted]
    first = jobs.submitted[0][0]
    assert baselines[0] is None  # nothing to compare with: a full run
    assert baselines[1] == baselines[2] == baselines[3] == jobs.results_path(first)
    assert store.find_runs("s1")[0].reason == f"re-check against {first}"


def test_a_spec_that_no_longer_resolves_is_recorded_failed(clock, tmp_path):
    store = MemoryJobStore()
    store.add_schedule(schedule("0 2 * * *", clock()))

    def gone(inputs):
        raise SpecError("test.tiles: no file matches test/*.tif")

    scheduler, jobs = make_scheduler(store, clock, tmp_path, resolve=gone)
    clock.set(at(2, 2))
    scheduler.tick()
    failed = store.find_runs("s1")[0]
    assert failed.outcome == "failed" and "no file matches" in failed.reason
    assert jobs.submitted == []


def test_a_deleted_schedule_stops(clock, tmp_path):
    store = MemoryJobStore()
    store.add_schedule(schedule("0 2 * * *", clock()))
    scheduler, jobs = make_scheduler(store, clock, tmp_path)
    assert store.remove_schedule("s1")
    clock.set(at(2, 2))
    assert scheduler.tick() == [] and jobs.submitted == []


# --- the lease: two schedulers on one SQLite file ---------------------------------------------


@pytest.fixture
def two_stores(tmp_path: Path) -> Iterator[tuple[SqliteJobStore, SqliteJobStore]]:
    """Two store objects (two connections) on one SQLite file, as two API processes have."""
    path = tmp_path / "jobs.sqlite"
    left, right = SqliteJobStore(path), SqliteJobStore(path)
    yield left, right
    left.close()
    right.close()


def test_the_lease_is_a_compare_and_set_with_expiry(two_stores):
    a, b = two_stores
    t0 = at(2, 2)
    assert a.acquire_lease(LEASE, "A", now=t0, ttl_s=60)
    assert not b.acquire_lease(LEASE, "B", now=t0, ttl_s=60)
    assert a.acquire_lease(LEASE, "A", now=t0 + dt.timedelta(seconds=50), ttl_s=60)  # renewed
    assert not b.acquire_lease(LEASE, "B", now=t0 + dt.timedelta(seconds=100), ttl_s=60)
    assert b.acquire_lease(LEASE, "B", now=t0 + dt.timedelta(seconds=110), ttl_s=60)  # expired
    assert not a.acquire_lease(LEASE, "A", now=t0 + dt.timedelta(seconds=111), ttl_s=60)
    b.release_lease(LEASE, "B")
    assert a.acquire_lease(LEASE, "A", now=t0 + dt.timedelta(seconds=112), ttl_s=60)


def test_a_scheduler_that_lost_its_lease_unawares_cannot_claim(two_stores):
    """A pauses between reading a schedule and claiming its slot; meanwhile its lease runs out
    and B claims the slot. A's claim then fails, whichever 'previous' it read."""
    a, b = two_stores
    a.add_schedule(schedule("0 2 * * *", at(1, 12)))
    assert a.acquire_lease(LEASE, "A", now=at(2, 2), ttl_s=60)
    late = at(2, 2, 5)
    assert b.acquire_lease(LEASE, "B", now=late, ttl_s=60)
    assert b.claim_slot("s1", at(2, 2), previous=None, owner="B", lease=LEASE, now=late)
    assert a.claim_slot("s1", at(2, 2), previous=None, owner="A", lease=LEASE, now=late) is None
    # even with the right 'previous', a lease it no longer holds is refused
    assert a.claim_slot("s1", at(3, 2), previous=at(2, 2), owner="A", lease=LEASE, now=late) is None
    assert [r.owner for r in a.find_runs("s1")] == ["B"]


class Interleaving:
    """A store proxy that, just before a claim, may let the other scheduler run a whole tick
    (sometimes after a pause longer than the lease): the race two API processes can have
    between reading a schedule and claiming its slot."""

    busy = False  # no nesting beyond one level

    def __init__(self, store: JobStore, clock: FrozenClock, rng: random.Random, lease_s: float):
        self.store = store
        self.other: Scheduler | None = None
        self._clock = clock
        self._rng = rng
        self._lease_s = lease_s

    def __getattr__(self, name: str) -> Any:
        return getattr(self.store, name)

    def claim_slot(self, *args: Any, **kwargs: Any) -> Any:
        roll = self._rng.random()
        if self.other is not None and not Interleaving.busy and roll < 0.6:
            Interleaving.busy = True
            try:
                if roll < 0.25:
                    self._clock.advance(seconds=self._lease_s + 1)
                self.other.tick()
            finally:
                Interleaving.busy = False
        return self.store.claim_slot(*args, **kwargs)


def test_two_schedulers_with_interleaved_ticks_never_run_a_slot_twice(two_stores, tmp_path):
    """Two schedulers (two store objects, one file) on one frozen clock tick in a random order;
    just before claiming, one may be overtaken by a whole tick of the other, now and then after
    a pause that outlasts its lease. Every slot claimed has exactly one job, and the lease did
    change hands."""
    rng = random.Random(7)
    clock = FrozenClock(at(2, 0))
    lease_s = 90.0
    a_store, b_store = (Interleaving(s, clock, rng, lease_s) for s in two_stores)
    a_store.add_schedule(schedule("* * * * *", at(2, 0), schedule_id="every-minute"))
    a_store.add_schedule(schedule("*/5 * * * *", at(2, 0), schedule_id="every-five"))
    options = {"lease_s": lease_s, "finish_at_once": True}
    a, a_jobs = make_scheduler(a_store, clock, tmp_path, owner="A", **options)  # type: ignore[arg-type]
    b, b_jobs = make_scheduler(b_store, clock, tmp_path, owner="B", **options)  # type: ignore[arg-type]
    a_store.other, b_store.other = b, a
    for _ in range(400):
        clock.advance(seconds=rng.choice([0, 5, 20, 45, 61]))
        for scheduler in rng.sample([a, b], 2):
            scheduler.tick()
    jobs_by_schedule: dict[str, list[str]] = {}
    for job_id, schedule_id, _ in a_jobs.submitted + b_jobs.submitted:
        jobs_by_schedule.setdefault(schedule_id, []).append(job_id)
    for schedule_id in ("every-minute", "every-five"):
        runs = a_store.find_runs(schedule_id, limit=100_000)
        assert len(runs) > 10 and {r.outcome for r in runs} == {"submitted"}
        assert len({r.slot for r in runs}) == len(runs)
        assert sorted(r.job_id for r in runs) == sorted(jobs_by_schedule[schedule_id])
        assert {r.owner for r in runs} == {"A", "B"}
        for r in runs:
            assert a_store.get(r.job_id).schedule_id == schedule_id


def test_two_schedulers_ticking_in_threads_claim_each_slot_once(two_stores, tmp_path):
    """The same on real threads: both tick as fast as they can while the clock moves."""
    a_store, b_store = two_stores
    a_store.add_schedule(schedule("* * * * *", at(2, 0)))
    clock = FrozenClock(at(2, 0))
    pairs = [
        make_scheduler(a_store, clock, tmp_path, owner="A", lease_s=30, finish_at_once=True),
        make_scheduler(b_store, clock, tmp_path, owner="B", lease_s=30, finish_at_once=True),
    ]
    done = threading.Event()

    def tick(scheduler: Scheduler) -> None:
        while not done.is_set():
            scheduler.tick()

    threads = [threading.Thread(target=tick, args=(s,)) for s, _ in pairs]
    for thread in threads:
        thread.start()
    try:
        for step in range(150):
            clock.advance(seconds=20)
            if step % 40 == 20:  # release the lease now and then: the other one takes it
                holder = pairs[step // 40 % 2][0]
                holder.store.release_lease(LEASE, holder.owner)
            threading.Event().wait(0.002)
    finally:
        done.set()
        for thread in threads:
            thread.join(10)
    submitted = [j for _, jobs in pairs for j in jobs.submitted]
    runs = a_store.find_runs("s1", limit=10_000)
    assert len(runs) == len(submitted) == len({r.slot for r in runs}) > 5
