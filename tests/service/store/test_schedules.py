"""The schedules part of the job store contract, on the SQLite and in-memory stores alike; and
older SQLite files gaining the new job and schedule columns."""

from __future__ import annotations

import datetime as dt
import sqlite3
from collections.abc import Iterator
from pathlib import Path

import pytest

from demaudit.service.store.jobs import (
    JobRecord,
    JobStore,
    MemoryJobStore,
)
from demaudit.service.store.schedules import ScheduleRecord
from demaudit.service.store.sqlite_jobs import SqliteJobStore

T0 = dt.datetime(2026, 11, 2, 2, 0, tzinfo=dt.UTC)


def schedule(n: int, **extra) -> ScheduleRecord:
    return ScheduleRecord(
        schedule_id=f"s{n}",
        name=f"nightly {n}",
        cron="0 2 * * *",
        inputs={"name": "job", "test": {"tiles": "t/*.tif"}},
        created=T0 - dt.timedelta(days=1, seconds=-n),
        **extra,
    )


@pytest.fixture(params=["memory", "sqlite"])
def store(request, tmp_path: Path) -> Iterator[JobStore]:
    opened: JobStore = (
        MemoryJobStore() if request.param == "memory" else SqliteJobStore(tmp_path / "j.sqlite")
    )
    yield opened
    opened.close()


def test_schedules_round_trip_list_and_remove(store):
    first = schedule(1, webhook="https://h.example/x", notify="always", baseline="latest")
    store.add_schedule(first)
    store.add_schedule(schedule(2, base_url="http://api:8000"))
    assert store.get_schedule("s1") == first
    assert store.get_schedule("nope") is None
    with pytest.raises(Exception):  # noqa: B017 - KeyError or sqlite3.IntegrityError
        store.add_schedule(first)
    assert [s.schedule_id for s in store.find_schedules()] == ["s1", "s2"]
    assert [s.schedule_id for s in store.find_schedules(limit=1, offset=1)] == ["s2"]
    assert store.count_schedules() == 2
    assert store.remove_schedule("s1") and not store.remove_schedule("s1")
    assert store.count_schedules() == 1


def test_a_schedules_time_zone_round_trips(store):
    store.add_schedule(schedule(1, timezone="Europe/Oslo"))
    store.add_schedule(schedule(2))
    assert store.get_schedule("s1") == schedule(1, timezone="Europe/Oslo")
    assert store.get_schedule("s2").timezone == "UTC"
    assert [s.timezone for s in store.find_schedules()] == ["Europe/Oslo", "UTC"]
    store.acquire_lease("L", "A", now=T0, ttl_s=60)
    store.claim_slot("s1", T0, previous=None, owner="A", lease="L", now=T0)
    store.record_run("s1", T0, outcome="submitted", job_id="job0")
    assert store.get_schedule("s1").timezone == "Europe/Oslo"  # claims keep the zone


def test_a_slot_is_claimed_once_and_only_by_the_lease_holder(store):
    store.add_schedule(schedule(1))
    assert store.claim_slot("s1", T0, previous=None, owner="A", lease="L", now=T0) is None
    assert store.acquire_lease("L", "A", now=T0, ttl_s=60)
    assert store.claim_slot("s1", T0, previous=None, owner="B", lease="L", now=T0) is None
    run = store.claim_slot("s1", T0, previous=None, owner="A", lease="L", now=T0)
    assert run is not None and (run.slot, run.outcome, run.owner) == (T0, "claimed", "A")
    assert store.claim_slot("s1", T0, previous=None, owner="A", lease="L", now=T0) is None
    assert store.get_schedule("s1").last_slot == T0
    later = T0 + dt.timedelta(days=1)
    assert store.claim_slot("s1", later, previous=T0, owner="A", lease="L", now=later) is None
    assert store.acquire_lease("L", "A", now=later, ttl_s=60)
    assert store.claim_slot("s1", later, previous=T0, owner="A", lease="L", now=later)
    assert store.claim_slot("gone", later, previous=None, owner="A", lease="L", now=later) is None


def test_runs_record_their_outcome_and_the_last_job(store):
    store.add_schedule(schedule(1))
    store.acquire_lease("L", "A", now=T0, ttl_s=60)
    for day, outcome in ((0, "submitted"), (1, "skipped"), (2, "failed")):
        slot = T0 + dt.timedelta(days=day)
        previous = slot - dt.timedelta(days=1) if day else None
        store.acquire_lease("L", "A", now=slot, ttl_s=60)
        assert store.claim_slot("s1", slot, previous=previous, owner="A", lease="L", now=slot)
        job_id = "job0" if outcome == "submitted" else None
        store.record_run("s1", slot, outcome=outcome, job_id=job_id, reason=f"r{day}")
    runs = store.find_runs("s1")
    assert [(r.outcome, r.job_id, r.reason) for r in runs] == [
        ("failed", None, "r2"),
        ("skipped", None, "r1"),
        ("submitted", "job0", "r0"),
    ]
    assert [r.slot for r in store.find_runs("s1", limit=1)] == [T0 + dt.timedelta(days=2)]
    assert store.get_schedule("s1").last_job_id == "job0"
    store.remove_schedule("s1")
    assert store.find_runs("s1") == []


def test_lease_release_only_by_its_owner(store):
    assert store.acquire_lease("L", "A", now=T0, ttl_s=60)
    store.release_lease("L", "B")
    assert not store.acquire_lease("L", "B", now=T0, ttl_s=60)
    store.release_lease("L", "A")
    assert store.acquire_lease("L", "B", now=T0, ttl_s=60)


def test_job_records_carry_their_schedule_and_notification(store):
    record = JobRecord("j1", "dem-audit", "accepted", "m", T0, T0, schedule_id="s1")
    store.add(record)
    assert store.get("j1") == record
    note = {"status": "failed", "attempts": 5, "error": "HTTP 503"}
    assert store.update("j1", {"notification": note}).notification == note
    assert store.get("j1").notification == note
    with pytest.raises(ValueError, match="schedule_id"):
        store.update("j1", {"schedule_id": "other"})


def test_an_older_sqlite_file_gains_the_new_columns(tmp_path):
    path = tmp_path / "old.sqlite"
    with sqlite3.connect(path) as db:  # the jobs table as the first release made it
        db.execute(
            "CREATE TABLE jobs (job_id TEXT PRIMARY KEY, process_id TEXT NOT NULL, status TEXT "
            "NOT NULL, message TEXT NOT NULL, created TEXT NOT NULL, updated TEXT NOT NULL, "
            "started TEXT, finished TEXT, progress INTEGER NOT NULL DEFAULT 0, tiles_done "
            "INTEGER NOT NULL DEFAULT 0, tiles_total INTEGER NOT NULL DEFAULT 0, inputs TEXT "
            "NOT NULL)"
        )
        db.execute(
            "INSERT INTO jobs VALUES ('j0', 'dem-audit', 'successful', 'done', ?, ?, NULL, "
            "NULL, 100, 4, 4, '{}')",
            (T0.isoformat(), T0.isoformat()),
        )
    store = SqliteJobStore(path)
    try:
        old = store.get("j0")
        assert old is not None and old.schedule_id is None and old.notification is None
        assert old.owner is None  # made before owners: admins only
        store.add_schedule(schedule(1))
        assert store.count_schedules() == 1
        store.add(JobRecord("j1", "dem-audit", "accepted", "m", T0, T0, owner="alice"))
        assert [r.job_id for r in store.find(owner="alice")] == ["j1"]
        assert store.count(owner="alice") == 1 and store.count() == 2
    finally:
        store.close()


def test_an_older_sqlite_file_gains_the_schedule_time_zone(tmp_path):
    """A file whose schedules table predates time zones: opening it adds the column (NOT NULL,
    default 'UTC'), its schedules read as UTC ones, and opening it again changes nothing."""
    path = tmp_path / "old.sqlite"
    with sqlite3.connect(path) as db:  # the schedules table as it was before time zones
        db.execute(
            "CREATE TABLE schedules (schedule_id TEXT PRIMARY KEY, name TEXT NOT NULL, cron TEXT "
            "NOT NULL, inputs TEXT NOT NULL, created TEXT NOT NULL, webhook TEXT, notify TEXT NOT "
            "NULL, baseline TEXT, base_url TEXT, last_slot TEXT, last_job_id TEXT)"
        )
        db.execute(
            "INSERT INTO schedules VALUES ('s0', 'nightly 0', '0 2 * * *', '{}', ?, NULL, "
            "'regressions', NULL, NULL, NULL, NULL)",
            (T0.isoformat(timespec="milliseconds"),),
        )
    store = SqliteJobStore(path)
    try:
        old = store.get_schedule("s0")
        assert old is not None and (old.timezone, old.cron, old.created) == ("UTC", "0 2 * * *", T0)
        assert old.owner is None and old.webhook_secret is None
        store.add_schedule(schedule(1, timezone="Europe/Oslo"))
    finally:
        store.close()
    reopened = SqliteJobStore(path)  # already upgraded: nothing to add
    try:
        zones = {s.schedule_id: s.timezone for s in reopened.find_schedules()}
        assert zones == {"s0": "UTC", "s1": "Europe/Oslo"}
    finally:
        reopened.close()
    with sqlite3.connect(path) as db:
        columns = {row[1]: row for row in db.execute("PRAGMA table_info(schedules)")}
    assert columns["timezone"][2:5] == ("TEXT", 1, "'UTC'")  # type, NOT NULL, default


def test_schedules_keep_their_owner_and_secret_and_list_by_owner(store):
    store.add_schedule(
        schedule(1, owner="alice", webhook="https://h.example/x", webhook_secret="k")
    )
    store.add_schedule(schedule(2, owner="bob"))
    store.add_schedule(schedule(3, owner="alice"))
    first = store.get_schedule("s1")
    assert first is not None and (first.owner, first.webhook_secret) == ("alice", "k")
    assert [s.schedule_id for s in store.find_schedules(owner="alice")] == ["s1", "s3"]
    assert [s.schedule_id for s in store.find_schedules(owner="alice", offset=1)] == ["s3"]
    assert store.count_schedules(owner="bob") == 1 and store.count_schedules() == 3
    assert store.find_schedules(owner="carol") == [] and store.count_schedules(owner="carol") == 0
