"""Health probes: /health/live answers while the process does; /health/ready is 503 with the
failing check when the Dask scheduler is unreachable, no worker is connected or the job store
cannot be written."""

from __future__ import annotations

import sqlite3
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

import pytest
from fastapi.testclient import TestClient

from demaudit.service.api.app import create_app
from demaudit.service.store.jobs import MemoryJobStore
from demaudit.service.store.sqlite_jobs import SqliteJobStore


class Cluster:
    """A stand-in Dask client whose scheduler and workers the test sets."""

    def __init__(self, *, workers: int = 2, reachable: bool = True) -> None:
        self.workers = workers
        self.reachable = reachable

    @property
    def status(self) -> str:
        return "running" if self.reachable else "closed"

    def nthreads(self) -> dict[str, int]:
        return {f"tcp://127.0.0.1:{n}": 1 for n in range(self.workers)}


class FullStore(MemoryJobStore):
    def check_writable(self) -> None:
        raise sqlite3.OperationalError("database or disk is full")


@pytest.fixture
def probe(settings, runner) -> Iterator[Any]:
    """probe(cluster, store=None) -> an anonymous TestClient on an app with that cluster."""
    opened: list[TestClient] = []

    def open_app(cluster: Cluster, store: Any = None) -> TestClient:
        @contextmanager
        def factory(_: Any) -> Iterator[Cluster]:
            yield cluster

        app = create_app(
            settings, store=store or MemoryJobStore(), runner=runner, client_factory=factory
        )
        client = TestClient(app)
        client.__enter__()
        opened.append(client)
        return client

    yield open_app
    for client in opened:
        client.__exit__(None, None, None)


def test_ready_when_scheduler_workers_and_store_are(probe):
    client = probe(Cluster())
    live = client.get("/health/live")
    assert live.status_code == 200 and live.json() == {"status": "pass"}
    ready = client.get("/health/ready")
    assert ready.status_code == 200
    body = ready.json()
    assert body["status"] == "pass" and body["checks"]["workers"]["connected"] == 2
    assert {c["status"] for c in body["checks"].values()} == {"pass"}


@pytest.mark.parametrize(
    ("cluster", "store", "failing", "words"),
    [
        (Cluster(reachable=False), None, "scheduler", "does not answer"),
        (Cluster(workers=0), None, "workers", "no Dask worker"),
        (Cluster(), FullStore(), "store", "OperationalError"),
    ],
)
def test_not_ready_is_503_naming_the_check(probe, cluster, store, failing, words):
    client = probe(cluster, store)
    response = client.get("/health/ready")
    assert response.status_code == 503
    body = response.json()
    assert body["status"] == "fail" and body["checks"][failing]["status"] == "fail"
    assert words in body["checks"][failing]["reason"]
    assert client.get("/health/live").status_code == 200  # alive all the same: no restart


def test_the_scheduler_coming_back_makes_it_ready_again(probe):
    cluster = Cluster(reachable=False)
    client = probe(cluster)
    assert client.get("/health/ready").status_code == 503
    cluster.reachable = True
    assert client.get("/health/ready").status_code == 200


def test_the_sqlite_store_write_probe_writes(tmp_path):
    store = SqliteJobStore(tmp_path / "jobs.sqlite")
    try:
        store.check_writable()
        store.check_writable()  # the same row, updated
    finally:
        store.close()
    with sqlite3.connect(tmp_path / "jobs.sqlite") as db:
        assert db.execute("SELECT name FROM probes").fetchall() == [("ready",)]
