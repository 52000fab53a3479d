"""The job store contract, on the SQLite and in-memory stores alike."""

from __future__ import annotations

import datetime as dt
import os
import sqlite3
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from demaudit.service.run.faults import (
    RESTART_MESSAGE,
    RESTART_QUEUED_MESSAGE,
    new_instance_id,
    orphan_reason,
    recover_orphans,
    sweep_partials,
)
from demaudit.service.store.jobs import (
    ACCEPTED,
    DISMISSED,
    FAILED,
    RUNNING,
    STATUSES,
    SUCCESSFUL,
    JobRecord,
    JobStore,
    Lease,
    MemoryJobStore,
)
from demaudit.service.store.sqlite_jobs import SqliteJobStore

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


# --- runner instances, leases and recovery (issue 14 item 5) ----------------------------------


def lease(instance: str, *, host: str = "elsewhere", pid: int = 1, minutes: float = 1) -> Lease:
    return Lease(instance, host, pid, T0 + dt.timedelta(minutes=minutes))


def test_runner_instance_and_cause_round_trip_and_leases_renew(make_store):
    store = make_store()
    original = record(1, RUNNING, runner_instance="h:1:abcd")
    store.add(original)
    assert store.get(original.job_id) == original
    with pytest.raises(ValueError):  # the runner of a job never changes
        store.update(original.job_id, {"runner_instance": "h:2:ef01"})
    failed = store.update(original.job_id, {"status": FAILED, "cause": "invalid-input"})
    assert failed is not None and failed.cause == "invalid-input"

    store.renew_lease(lease("a", minutes=1))
    store.renew_lease(lease("b", minutes=1))
    store.renew_lease(lease("a", minutes=5))  # renewal moves the expiry only
    assert sorted(store.leases(), key=lambda x: x.instance) == [
        lease("a", minutes=5),
        lease("b", minutes=1),
    ]
    store.drop_lease("a")
    assert store.leases() == [lease("b", minutes=1)]


def test_an_older_sqlite_file_gains_the_runner_columns(tmp_path):
    path = tmp_path / "old.sqlite"
    db = sqlite3.connect(path)
    db.execute(
        "CREATE TABLE jobs (job_id TEXT PRIMARY KEY, process_id TEXT NOT NULL, status TEXT NOT "
        "NULL, message TEXT NOT NULL, created TEXT NOT NULL, updated TEXT NOT NULL, started "
        "TEXT, finished TEXT, progress INTEGER NOT NULL DEFAULT 0, tiles_done INTEGER NOT NULL "
        "DEFAULT 0, tiles_total INTEGER NOT NULL DEFAULT 0, inputs TEXT NOT NULL)"
    )
    at = T0.isoformat()
    db.execute(
        "INSERT INTO jobs (job_id, process_id, status, message, created, updated, inputs) "
        "VALUES ('x', 'dem-audit', 'running', 'm', ?, ?, '{}')",
        (at, at),
    )
    db.commit()
    db.close()
    store = SqliteJobStore(path)
    old = store.get("x")
    assert old is not None and old.runner_instance is None and old.cause is None
    assert recover_orphans(store, instance="me", now=T0) == ["x"]  # no runner: recovered
    store.close()


HOST, PID = "here", 4242


@pytest.mark.parametrize(
    ("runner", "leases", "alive", "gone"),
    [
        ("me", {}, set(), False),  # this process's own job
        (None, {}, set(), True),  # recorded before runner instances
        ("other", {}, set(), True),  # no lease (it stopped cleanly, or never took one)
        ("other", {"other": lease("other", host="far", pid=7)}, set(), False),  # live lease
        ("other", {"other": lease("other", host="far", pid=7, minutes=-1)}, set(), True),
        ("other", {"other": lease("other", host=HOST, pid=7)}, {7}, False),  # alive here
        ("other", {"other": lease("other", host=HOST, pid=7)}, set(), True),  # its pid is gone
        ("other", {"other": lease("other", host=HOST, pid=PID)}, {PID}, True),  # our pid: old us
    ],
)
def test_orphan_reason_fails_only_jobs_of_processes_that_are_gone(runner, leases, alive, gone):
    job = record(1, RUNNING, runner_instance=runner)
    reason = orphan_reason(
        job, leases, instance="me", now=T0, host=HOST, pid=PID, pid_alive=alive.__contains__
    )
    assert (reason is not None) == gone


def test_recovery_fails_orphans_removes_their_partial_outputs_and_spares_a_live_neighbour(
    make_store, tmp_path
):
    store = make_store()
    results = tmp_path / "results"
    dead = record(1, RUNNING, runner_instance="dead")
    live = record(2, RUNNING, runner_instance="live")
    mine = record(3, ACCEPTED, runner_instance="me")
    queued_dead = record(4, ACCEPTED, runner_instance="dead")
    for job in (dead, live, mine, queued_dead):
        store.add(job)
        (results / f"{job.job_id}.partial-{job.job_id}" / "results.zarr").mkdir(parents=True)
    (results / dead.job_id).mkdir()  # an older result the dead run was replacing
    store.renew_lease(lease("live", host="far", pid=1, minutes=10))
    store.renew_lease(lease("dead", host="far", pid=1, minutes=-1))

    failed = recover_orphans(store, results_dir=results, instance="me", now=T0)

    assert sorted(failed) == sorted([dead.job_id, queued_dead.job_id])
    ended = store.get(dead.job_id)
    assert ended is not None and ended.status == FAILED and ended.cause == "interrupted"
    assert ended.message == RESTART_MESSAGE
    queued = store.get(queued_dead.job_id)
    assert queued is not None and queued.message == RESTART_QUEUED_MESSAGE
    assert store.get(live.job_id) == live and store.get(mine.job_id) == mine
    left = sorted(p.name for p in results.iterdir())
    assert left == sorted(f"{j.job_id}.partial-{j.job_id}" for j in (live, mine))


def test_a_partial_folder_written_again_after_its_job_ended_goes_at_the_next_pass(
    make_store, tmp_path
):
    store = make_store()
    results = tmp_path / "results"
    dead = record(1, RUNNING, runner_instance="dead")
    live = record(2, RUNNING, runner_instance="live")
    done = record(3, SUCCESSFUL, runner_instance="live")
    for job in (dead, live, done):
        store.add(job)
    store.renew_lease(lease("live", host="far", pid=1, minutes=10))
    store.renew_lease(lease("dead", host="far", pid=1, minutes=-1))
    assert recover_orphans(store, results_dir=results, instance="me", now=T0) == [dead.job_id]

    # a tile task of the dead run finishes after the removal and writes its tile again
    late = results / f"{dead.job_id}.partial-{dead.job_id}" / "results.zarr" / "tile_summaries"
    late.mkdir(parents=True)
    kept = [
        results / f"{live.job_id}.partial-{live.job_id}",  # still running
        results / "nightly.partial-20261203",  # no job of the store: a CLI run's output
        results / dead.job_id,  # not a partial folder
    ]
    for folder in kept:
        folder.mkdir()
    (results / f"{done.job_id}.partial-x").mkdir()

    assert recover_orphans(store, results_dir=results, instance="me", now=T0) == []
    assert sorted(results.iterdir()) == sorted(kept)


def test_a_folder_name_no_job_can_have_is_left_alone(make_store, tmp_path):
    store = make_store()
    results = tmp_path / "results"
    odd = os.fsdecode(b"\xff.partial-1")  # not UTF-8: the SQLite store cannot even look it up
    (results / odd).mkdir(parents=True)
    assert recover_orphans(store, results_dir=results, instance="me", now=T0) == []
    assert sweep_partials(store, tmp_path / "missing") == []
    assert [p.name for p in results.iterdir()] == [odd]


def test_another_runner_of_this_same_process_is_alive():
    sibling = new_instance_id()  # e.g. a second app in one test process
    leases = {sibling: lease(sibling, host=HOST, pid=PID)}
    job = record(1, RUNNING, runner_instance=sibling)
    alive = {PID}.__contains__  # this process
    reason = orphan_reason(job, leases, instance="me", now=T0, host=HOST, pid=PID, pid_alive=alive)
    assert reason is None
