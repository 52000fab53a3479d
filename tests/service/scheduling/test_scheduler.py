"""The scheduler: the plan for one schedule, the loop on fake jobs, and the lease
that keeps two schedulers on one SQLite file from running a slot twice."""

from __future__ import annotations

import datetime as dt
import random
import threading
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

from demaudit.service.scheduling.cron import (
    due_runs,
)
from demaudit.service.scheduling.scheduler import LEASE, LastRun, Run, Scheduler, Skip, plan
from demaudit.service.store.jobs import (
    ACCEPTED,
    RUNNING,
    SUCCESSFUL,
    JobRecord,
    JobStore,
    MemoryJobStore,
)
from demaudit.service.store.sqlite_jobs import SqliteJobStore
from demaudit.workers.errors import SpecError
from tests.support.schedules import UTC, at, schedule

# --- plan: run, skip or nothing ---------------------------------------------------------------


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
