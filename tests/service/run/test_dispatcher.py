"""The dispatcher under faults, without Dask: the job store refusing writes, tasks that never
finish, a cluster that drops the job's tasks or does not answer; the problem a failed job's
results give (issue 17 item 4). Which cause an exception maps to: test_faults.py."""

from __future__ import annotations

import logging
import sqlite3
import threading
import time
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient

from demaudit.service.api.app import create_app
from demaudit.service.run.cluster import ClusterConnection
from demaudit.service.run.dispatcher import JobDispatcher
from demaudit.service.run.faults import (
    CLUSTER,
    LOST_MESSAGE,
    RESOURCES,
)
from demaudit.service.store.jobs import FAILED, RUNNING, JobRecord, MemoryJobStore
from demaudit.workers.errors import (
    JobDismissedError,
    SpecError,
    TileReadError,
)
from demaudit.workers.spec import ResolvedJob
from tests.service.tokens import AUTH

DISK_FULL = "database or disk is full"  # SQLite's message for SQLITE_FULL (sqlite.org/rescode)


class FlakyStore(MemoryJobStore):
    """A job store whose writes fail like a full disk: progress writes when ``progress_fails``,
    every write of a job record when ``all_fail``."""

    def __init__(self) -> None:
        super().__init__()
        self.progress_fails = False
        self.all_fail = False

    def update(self, job_id: str, changes: Mapping[str, Any], **kwargs: Any) -> JobRecord | None:
        if self.all_fail or (self.progress_fails and "tiles_done" in changes):
            raise sqlite3.OperationalError(DISK_FULL)
        return super().update(job_id, changes, **kwargs)


class StepRunner:
    """Writes a partial output, reports one of three tiles, then waits (as run_job waits on its
    tasks) until should_stop() or ``release``; finishes the other tiles after release."""

    def __init__(self) -> None:
        self.release = threading.Event()
        self.fail: BaseException | None = None
        self.submit_task = False

    def __call__(
        self,
        job: ResolvedJob,
        out_dir: Path,
        *,
        client: Any,
        progress: Callable[[int, int], None],
        should_stop: Callable[[], bool],
        run_id: str,
        **_: Any,
    ) -> dict[str, Any]:
        partial = out_dir.with_name(f"{out_dir.name}.partial-{run_id}")
        (partial / "results.zarr").mkdir(parents=True)
        if self.submit_task:
            client.submit(sum, [1, 2], key=f"audit-tile-t0-{run_id}")
        progress(1, 3)
        while not self.release.wait(0.01):
            if should_stop():
                raise JobDismissedError("stopped")
        if self.fail is not None:
            raise self.fail
        progress(2, 3)
        progress(3, 3)
        partial.rename(out_dir)
        return {"job": {"name": "x", "tiles": {"test": 3, "reference": 1, "failed": 0}}}


class NeverDone:
    """A Dask future that never finishes unless cancelled."""

    def __init__(self, key: str) -> None:
        self.key = key
        self.status = "pending"

    def done(self) -> bool:
        return self.status != "pending"


class StuckClient:
    """A Dask client whose tasks never finish; ``drop()`` cancels them as a lost scheduler
    does."""

    status = "running"

    def __init__(self, workers: int = 2) -> None:
        self.workers = workers
        self.futures: list[NeverDone] = []
        self.cancelled: list[str] = []

    def submit(self, *args: Any, key: str, **kwargs: Any) -> NeverDone:
        future = NeverDone(key)
        self.futures.append(future)
        return future

    def cancel(self, futures: list[NeverDone]) -> None:
        for future in futures:
            future.status = "cancelled"
            self.cancelled.append(future.key)

    def drop(self) -> None:
        for future in self.futures:
            future.status = "cancelled"

    def nthreads(self) -> dict[str, int]:
        return {f"tcp://127.0.0.1:{n}": 1 for n in range(self.workers)}

    def processing(self) -> dict[str, list[str]]:
        """What each worker runs: the pending tasks, shared out, when there are workers."""
        pending = [f.key for f in self.futures if f.status == "pending"]
        return {w: pending[int(w.rsplit(":", 1)[1]) :: self.workers] for w in self.nthreads()}


@pytest.fixture
def job() -> ResolvedJob:
    return ResolvedJob.__new__(ResolvedJob)  # the runners here never read it


@pytest.fixture
def make_dispatcher(tmp_path: Path) -> Iterator[Callable[..., JobDispatcher]]:
    opened: list[JobDispatcher] = []

    def make(store: MemoryJobStore, runner: StepRunner, **kwargs: Any) -> JobDispatcher:
        kwargs.setdefault("client", StuckClient())
        dispatcher = JobDispatcher(
            store, results_dir=tmp_path / "results", grid_dirs=(), runner=runner, **kwargs
        )
        opened.append(dispatcher)
        return dispatcher

    yield make
    for dispatcher in opened:
        dispatcher.close(timeout=5)


def wait_ended(dispatcher: JobDispatcher, timeout: float = 10.0) -> None:
    deadline = time.monotonic() + timeout
    while dispatcher.active():
        assert time.monotonic() < deadline, "the job did not end"
        time.sleep(0.01)


def test_a_progress_write_refused_ends_the_job_failed_with_the_cause(make_dispatcher, job):
    store, runner = FlakyStore(), StepRunner()
    store.progress_fails = True
    dispatcher = make_dispatcher(store, runner)
    record = dispatcher.submit(job, {})
    wait_ended(dispatcher)
    ended = store.get(record.job_id)
    assert ended is not None and ended.status == FAILED
    assert ended.cause == RESOURCES
    assert DISK_FULL in ended.message and "job store" in ended.message
    assert not any(dispatcher.results_dir.iterdir())  # the partial folder went with it
    assert dispatcher.store_problem() is None  # the failure itself was written


def test_a_store_that_takes_no_write_is_logged_reported_and_retried(make_dispatcher, job, caplog):
    store, runner = FlakyStore(), StepRunner()
    dispatcher = make_dispatcher(store, runner)
    record = dispatcher.submit(job, {})
    deadline = time.monotonic() + 10
    while (r := store.get(record.job_id)) is None or r.tiles_done < 1:
        assert time.monotonic() < deadline
        time.sleep(0.01)
    with caplog.at_level(logging.ERROR, logger="demaudit.jobs"):
        store.all_fail = True
        runner.release.set()  # the job finishes, but neither progress nor its end is written
        wait_ended(dispatcher)
    stuck = store.get(record.job_id)
    assert stuck is not None and stuck.status == RUNNING  # the store took nothing
    problem = dispatcher.store_problem()
    assert problem is not None and DISK_FULL in problem
    assert any("job store" in r.getMessage() for r in caplog.records)
    assert not (dispatcher.results_dir / record.job_id).exists()  # no result without a record

    store.all_fail = False  # space again: the next watchdog tick writes the end
    dispatcher.watch_once()
    ended = store.get(record.job_id)
    assert ended is not None and ended.status == FAILED and ended.cause == RESOURCES
    assert dispatcher.store_problem() is None


def test_a_job_whose_tasks_never_finish_fails_after_the_stall_time(make_dispatcher, job):
    client, runner = StuckClient(workers=0), StepRunner()
    runner.submit_task = True
    dispatcher = make_dispatcher(
        MemoryJobStore(), runner, client=client, stall_timeout_s=0.2, watch_interval_s=0.02
    )
    dispatcher.start()
    record = dispatcher.submit(job, {})
    wait_ended(dispatcher)
    ended = dispatcher.store.get(record.job_id)
    assert ended is not None and ended.status == FAILED and ended.cause == CLUSTER
    assert ended.message == "no tile finished for 0.2 s; workers: 0"
    assert client.cancelled == [f"audit-tile-t0-{record.job_id}"]  # its task was cancelled


def test_a_slow_task_still_running_on_a_worker_is_not_a_stall(make_dispatcher, job):
    client, runner = StuckClient(workers=1), StepRunner()
    runner.submit_task = True
    dispatcher = make_dispatcher(
        MemoryJobStore(), runner, client=client, stall_timeout_s=0.05, watch_interval_s=10
    )
    record = dispatcher.submit(job, {})
    deadline = time.monotonic() + 10
    while not client.futures:
        assert time.monotonic() < deadline
        time.sleep(0.01)
    for _ in range(5):
        time.sleep(0.06)
        dispatcher.watch_once()
    assert dispatcher.active() == 1 and client.cancelled == []  # still waiting for it
    client.workers = 0  # its worker is gone: now it is a stall
    time.sleep(0.06)
    dispatcher.watch_once()
    wait_ended(dispatcher)
    ended = dispatcher.store.get(record.job_id)
    assert ended is not None and ended.message == "no tile finished for 0.05 s; workers: 0"


def test_without_a_stall_time_a_waiting_job_is_left_waiting(make_dispatcher, job):
    client, runner = StuckClient(), StepRunner()
    runner.submit_task = True
    dispatcher = make_dispatcher(MemoryJobStore(), runner, client=client, watch_interval_s=0.02)
    dispatcher.start()
    record = dispatcher.submit(job, {})
    for _ in range(20):
        dispatcher.watch_once()
    assert dispatcher.active() == 1 and client.cancelled == []
    runner.release.set()
    wait_ended(dispatcher)
    ended = dispatcher.store.get(record.job_id)
    assert ended is not None and ended.status == "successful"


def test_tasks_dropped_by_a_lost_scheduler_fail_the_job_as_a_cluster_fault(make_dispatcher, job):
    client, runner = StuckClient(), StepRunner()
    runner.submit_task = True
    dispatcher = make_dispatcher(MemoryJobStore(), runner, client=client)
    record = dispatcher.submit(job, {})
    deadline = time.monotonic() + 10
    while not client.futures:
        assert time.monotonic() < deadline
        time.sleep(0.01)
    client.drop()
    wait_ended(dispatcher)
    ended = dispatcher.store.get(record.job_id)
    assert ended is not None and ended.status == FAILED
    assert (ended.cause, ended.message) == (CLUSTER, LOST_MESSAGE)


class Reachable:
    """A stand-in Dask client: connected or closed for good."""

    def __init__(self, status: str = "running") -> None:
        self.status = status
        self.closed = False

    def nthreads(self) -> dict[str, int]:
        return {"tcp://127.0.0.1:1": 1}

    def close(self, timeout: float = 0) -> None:
        self.closed = True
        self.status = "closed"


def test_a_closed_client_is_made_anew_once_the_scheduler_answers():
    first = Reachable()
    answers: Iterator[Reachable | None] = iter([None, Reachable()])

    def connect() -> Reachable:
        fresh = next(answers)
        if fresh is None:
            raise OSError("Timed out trying to connect to tcp://127.0.0.1:9")
        return fresh

    connection = ClusterConnection(first, connect=connect, address="tcp://x", retry_s=0)
    assert connection.ensure() and connection.client is first
    first.status = "connecting"  # distributed is still retrying by itself: leave it
    assert not connection.ensure() and connection.client is first
    first.status = "closed"  # it gave up
    assert not connection.ensure()  # the scheduler is still away
    assert connection.ensure()  # it answers again
    assert connection.client is not first and connection.status == "running"
    assert connection.reconnections == 1 and first.closed


def test_without_a_connect_function_a_closed_client_stays_closed():
    connection = ClusterConnection(Reachable("closed"))
    assert not connection.ensure() and connection.status == "closed"


@pytest.fixture
def app_with(settings, tmp_path) -> Iterator[Callable[..., TestClient]]:
    opened: list[TestClient] = []

    def open_app(client: Any, runner: Any, store: Any = None) -> TestClient:
        @contextmanager
        def factory(_: Any) -> Iterator[Any]:
            yield client

        app = create_app(
            settings, store=store or MemoryJobStore(), runner=runner, client_factory=factory
        )
        api = TestClient(app, headers=AUTH)
        api.__enter__()
        opened.append(api)
        return api

    yield open_app
    for api in opened:
        api.__exit__(None, None, None)


def test_submissions_are_refused_while_the_scheduler_does_not_answer(app_with, spec):
    api = app_with(Reachable("closed"), StepRunner())
    response = api.post("/processes/dem-audit/execution", json={"inputs": spec})
    assert response.status_code == 503
    problem = response.json()
    assert problem["type"] == "urn:demaudit:problem:cluster-unavailable"
    assert "does not answer" in problem["detail"] and response.headers["Retry-After"]
    assert api.get("/jobs").json()["jobs"] == []  # nothing was recorded
    assert api.get("/health/ready").status_code == 503


@pytest.mark.parametrize(
    ("error", "cause"),
    [
        (SpecError("test.tiles: no file matches 'test/*.tif'"), "invalid-input"),
        (TileReadError("test/t1.tif: cannot open (not a raster)"), "tile-unreadable"),
    ],
)
def test_results_of_a_failed_job_say_the_cause(app_with, spec, submit, wait_for, error, cause):
    runner = StepRunner()
    runner.fail = error
    runner.release.set()
    api = app_with(Reachable(), runner)
    job_id = submit(api, spec)
    wait_for(api, job_id, lambda d: d["status"] == "failed")
    response = api.get(f"/jobs/{job_id}/results")
    assert response.status_code == 409
    problem = response.json()
    assert problem["type"] == "urn:demaudit:problem:job-failed"
    assert problem["cause"]["type"] == f"urn:demaudit:problem:{cause}"
    assert problem["cause"]["status"] == 422 and str(error) in problem["detail"]


def test_readiness_reports_a_job_store_write_that_failed(app_with, spec, submit, wait_for):
    store, runner = FlakyStore(), StepRunner()
    api = app_with(Reachable(), runner, store)
    assert api.get("/health/ready").status_code == 200
    job_id = submit(api, spec)
    wait_for(api, job_id, lambda d: d["status"] == "running")
    store.all_fail = True
    runner.release.set()  # its next progress write fails
    deadline = time.monotonic() + 10
    while (ready := api.get("/health/ready")).status_code != 503:
        assert time.monotonic() < deadline, ready.json()
        time.sleep(0.01)
    assert ready.json()["checks"]["store"]["status"] == "fail"
    assert "OperationalError" in ready.json()["checks"]["store"]["reason"]
