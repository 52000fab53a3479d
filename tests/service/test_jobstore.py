"""The job store contract, on the SQLite and in-memory stores alike."""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from service.jobstore import (
    ACCEPTED,
    DISMISSED,
    FAILED,
    RUNNING,
    STATUSES,
    SUCCESSFUL,
    JobRecord,
    JobStore,
    MemoryJobStore,
    SqliteJobStore,
)

T0 = dt.datetime(2026, 11, 2, 8, 0, tzinfo=dt.UTC)


def record(n: int, status: str = ACCEPTED, **extra) -> JobRecord:
    created = T0 + dt.timedelta(seconds=n)
    return JobRecord(f"{n:032x}", "dem-audit", status, "m", created, created, **extra)  # type: ignore[arg-type]


@pytest.fixture(params=["memory", "sqlite"])
def make_store(request, tmp_path: Path) -> Iterator[Callable[[], JobStore]]:
    opened: list[JobStore] = []

    def make() -> JobStore:
        store: JobStore = (
            MemoryJobStore()
            if request.param == "memory"
            else SqliteJobStore(tmp_path / f"jobs-{len(opened)}.sqlite")
        )
        opened.append(store)
        return store

    yield make
    for store in opened:
        store.close()


def test_records_round_trip(make_store):
    store = make_store()
    original = record(1, inputs={"name": "a", "classes": {"1": {"name": "open"}}})
    store.add(original)
    assert store.get(original.job_id) == original
    assert store.get("missing") is None
    with pytest.raises(Exception):  # noqa: B017 - KeyError or sqlite3.IntegrityError
        store.add(original)


def test_update_is_a_compare_and_set_on_the_status(make_store):
    store = make_store()
    store.add(record(1))
    assert store.update(record(1).job_id, {"status": RUNNING}, only_from={RUNNING}) is None
    started = T0 + dt.timedelta(minutes=1)
    new = store.update(
        record(1).job_id, {"status": RUNNING, "started": started}, only_from={ACCEPTED}
    )
    assert new is not None and new.status == RUNNING and new.started == started
    assert new.updated > record(1).updated
    assert store.update("missing", {"progress": 5}) is None
    with pytest.raises(ValueError):
        store.update(record(1).job_id, {"job_id": "other"})
    with pytest.raises(ValueError):
        store.update(record(1).job_id, {"status": "sleeping"})


def test_counts_and_tiles_done(make_store):
    store = make_store()
    for n, status in enumerate([ACCEPTED, RUNNING, RUNNING, SUCCESSFUL]):
        store.add(record(n, status, tiles_done=n))
    assert store.count_by_status() == {
        ACCEPTED: 1,
        RUNNING: 2,
        SUCCESSFUL: 1,
        FAILED: 0,
        DISMISSED: 0,
    }
    assert store.count() == 4 and store.count(statuses={RUNNING, FAILED}) == 2
    assert store.count(statuses=set()) == 0
    assert store.tiles_done_total() == 6


def test_fail_unfinished_touches_only_that_status(make_store):
    store = make_store()
    store.add(record(1, RUNNING))
    store.add(record(2, SUCCESSFUL))
    assert store.fail_unfinished(RUNNING, "server restarted while the job ran") == [
        record(1).job_id
    ]
    failed = store.get(record(1).job_id)
    assert failed is not None and failed.status == FAILED and failed.finished is not None
    assert failed.message == "server restarted while the job ran"
    assert store.get(record(2).job_id) == record(2, SUCCESSFUL)


def test_sqlite_records_survive_reopening(tmp_path):
    store = SqliteJobStore(tmp_path / "jobs.sqlite")
    store.add(record(7, RUNNING, progress=40, tiles_done=4, tiles_total=10))
    store.close()
    reopened = SqliteJobStore(tmp_path / "jobs.sqlite")
    assert reopened.get(record(7).job_id) == record(
        7, RUNNING, progress=40, tiles_done=4, tiles_total=10
    )
    reopened.close()


@settings(max_examples=25, deadline=None)
@given(
    statuses=st.lists(st.sampled_from(STATUSES), max_size=12),
    limit=st.integers(1, 5),
    chosen=st.sets(st.sampled_from(STATUSES), min_size=1),
)
def test_paging_visits_every_matching_job_once_newest_first(statuses, limit, chosen):
    store = MemoryJobStore()
    for n, status in enumerate(statuses):
        store.add(record(n, status))
    seen: list[JobRecord] = []
    offset = 0
    while page := store.find(statuses=chosen, limit=limit, offset=offset):
        seen += page
        offset += limit
    want = sorted(
        (record(n, s) for n, s in enumerate(statuses) if s in chosen),
        key=lambda r: r.created,
        reverse=True,
    )
    assert seen == want
    assert store.count(statuses=chosen) == len(want)


def test_jobs_keep_their_owner_and_filter_by_it(make_store):
    store = make_store()
    for n, owner in enumerate(["alice", "bob", "alice", None]):
        store.add(record(n, SUCCESSFUL if n % 2 else ACCEPTED, owner=owner))
    assert store.get(record(0).job_id).owner == "alice"
    assert [r.job_id for r in store.find(owner="alice")] == [record(2).job_id, record(0).job_id]
    assert store.count(owner="alice") == 2 and store.count() == 4
    assert store.count(owner="alice", statuses={ACCEPTED}) == 2
    assert store.find(owner="bob", statuses={ACCEPTED}) == []
    with pytest.raises(ValueError, match="owner"):
        store.update(record(0).job_id, {"owner": "bob"})  # a job never changes hands
