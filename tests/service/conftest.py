"""Fixtures of the REST service tests: an app with an in-memory store, a stand-in cluster and a
runner that the test drives (no Dask, no rasters)."""

from __future__ import annotations

import json
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient

from demaudit.service.api.app import create_app
from demaudit.service.settings import Settings
from demaudit.service.store.jobs import JobStore, MemoryJobStore
from demaudit.workers.errors import JobDismissedError
from demaudit.workers.spec import ResolvedJob
from tests.service.tokens import AUTH, PRINCIPALS

SPEC = {
    "name": "unit-job",
    "test": {"tiles": "test/*.tif", "vertical_crs": "ellipsoidal", "units": "metre"},
    "reference": {"tiles": "ref", "vertical_crs": "EPSG:5773", "units": "metre"},
}


class FakeClient:
    """Stands in for distributed.Client where only the health probe talks to it."""

    status = "running"

    def nthreads(self) -> dict[str, int]:
        return {"tcp://127.0.0.1:1": 1, "tcp://127.0.0.1:2": 1}


@contextmanager
def fake_cluster(settings: Settings) -> Iterator[FakeClient]:
    yield FakeClient()


@dataclass
class ScriptedRunner:
    """A runner whose jobs run until the test releases them (``gate``), reporting 4 tiles.

    ``fail`` makes it raise that exception instead of finishing.
    """

    gate: threading.Event = field(default_factory=threading.Event)
    fail: BaseException | None = None
    started: list[str] = field(default_factory=list)
    stopped: list[str] = field(default_factory=list)

    def __call__(
        self,
        job: ResolvedJob,
        out_dir: Path,
        *,
        client: Any,
        grid_dirs: Any,
        progress: Callable[[int, int], None],
        should_stop: Callable[[], bool],
        run_id: str,
        retries: int,
        tile_timeout_s: float | None = None,
    ) -> dict[str, Any]:
        self.started.append(run_id)
        out_dir.mkdir(parents=True, exist_ok=True)
        (out_dir / "results.zarr").mkdir()
        (out_dir / "results.zarr" / "zarr.json").write_text('{"zarr_format": 3}')
        progress(1, 4)
        while not self.gate.wait(0.01):
            if should_stop():
                self.stopped.append(run_id)
                raise JobDismissedError("dismissed")
        if self.fail is not None:
            raise self.fail
        for done in (2, 3, 4):
            progress(done, 4)
        document = {
            "job": {"name": job.spec.name, "tiles": {"test": 4, "reference": 1, "failed": 0}},
            "overall": {"count": 10, "median": 0.25},
            "regions": [{"region": "EAST", "name": "East", "stats": {"count": 6}}],
            "tiles": [{"tile": f"t{i}", "status": "ok", "stats": {"count": i}} for i in range(4)],
        }
        (out_dir / "summary.json").write_text(json.dumps(document))
        return document


@pytest.fixture
def data_root(tmp_path: Path) -> Path:
    """A data root holding empty stand-in tiles (the scripted runner never reads them)."""
    root = tmp_path / "data"
    (root / "test").mkdir(parents=True)
    (root / "ref").mkdir()
    for name in ("test/a.tif", "test/b.tif", "ref/r.tif"):
        (root / name).write_bytes(b"")
    return root


@pytest.fixture
def settings(tmp_path: Path, data_root: Path) -> Settings:
    return Settings(
        principals=PRINCIPALS,
        data_roots=(data_root,),
        results_dir=tmp_path / "results",
        job_store=tmp_path / "jobs.sqlite",
        max_running_jobs=2,
        max_body_bytes=4096,
    )


@pytest.fixture
def runner() -> Iterator[ScriptedRunner]:
    scripted = ScriptedRunner()
    yield scripted
    scripted.gate.set()  # never leave a job thread waiting


@pytest.fixture
def store() -> JobStore:
    return MemoryJobStore()


@pytest.fixture
def api(settings: Settings, store: JobStore, runner: ScriptedRunner) -> Iterator[TestClient]:
    app = create_app(
        settings,
        store=store,
        runner=runner,
        client_factory=fake_cluster,
        webhook_resolver=public_resolver,
    )
    with TestClient(app, headers=AUTH) as client:
        yield client


def public_resolver(host: str, port: int) -> list[str]:
    """Stands in for DNS in the API tests (no test looks a name up): *.example.org gets a
    public address (93.184.216.34, never called: no test delivers there), 'localhost' the
    loopback ones; anything else does not resolve."""
    if host == "localhost":
        return ["127.0.0.1", "::1"]
    if host == "example.org" or host.endswith(".example.org"):
        return ["93.184.216.34"]
    raise OSError(f"stub resolver: no address for {host}")


def _wait_for(
    client: TestClient,
    job_id: str,
    predicate: Callable[[dict[str, Any]], bool],
    timeout: float = 5.0,
) -> dict[str, Any]:
    """Poll the job's status document until predicate holds (AssertionError on timeout)."""
    deadline = time.monotonic() + timeout
    while True:
        doc: dict[str, Any] = client.get(f"/jobs/{job_id}").json()
        if predicate(doc):
            return doc
        assert time.monotonic() < deadline, f"job {job_id} stuck: {doc}"
        time.sleep(0.01)


def _submit(client: TestClient, spec: dict[str, Any] | None = None) -> str:
    response = client.post(
        "/processes/dem-audit/execution",
        json={"inputs": spec or SPEC},
        headers={"Prefer": "respond-async"},
    )
    assert response.status_code == 201, response.text
    job_id: str = response.json()["jobID"]
    return job_id


@pytest.fixture
def wait_for() -> Callable[..., dict[str, Any]]:
    """wait_for(client, job_id, predicate, timeout=5.0) -> the status document."""
    return _wait_for


@pytest.fixture
def submit() -> Callable[..., str]:
    """submit(client, spec=SPEC) -> job id (asserts 201)."""
    return _submit


@pytest.fixture
def spec() -> dict[str, Any]:
    """A valid spec for the data_root fixture (a fresh copy)."""
    return json.loads(json.dumps(SPEC))


@pytest.fixture
def resolver() -> Callable[[str, int], list[str]]:
    """The stub name resolver for create_app(webhook_resolver=...)."""
    return public_resolver


@pytest.fixture
def cluster_factory() -> Callable[[Settings], Any]:
    """A client factory for create_app that starts no cluster."""
    return fake_cluster
