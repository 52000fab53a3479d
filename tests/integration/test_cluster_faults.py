"""Cluster faults against the REST service as deployed (issue 17 item 4): a real ``demaudit
serve`` process on an external ``dask scheduler`` with ``dask worker`` processes, and the
scheduler or the workers killed under it.

Each test starts its own cluster (it breaks it); every process is stopped with its group by the
``processes`` fixture.
"""

from __future__ import annotations

import os
import shutil
import signal
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import httpx
import pytest

from demaudit.workers.demo.archive import make_demo_archive
from demaudit.workers.demo.options import DemoArchiveOptions
from tests.integration.test_rest_server import (
    EXECUTE,
    PRINCIPALS,
    REPO,
    Server,
    demo_spec,
    tiny_spec,
    wait_until,
)
from tests.support.processes import VENV_BIN, Process, free_port

pytestmark = pytest.mark.slow

PROBLEM = "urn:demaudit:problem:"
FINISHED = {"successful", "failed", "dismissed"}


@pytest.fixture(scope="module")
def roots(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """A copy of the demo archive (36 tiles: a job long enough to break the cluster under it)
    and a tiny archive (a quick job)."""
    base = tmp_path_factory.mktemp("roots")
    shutil.copytree(REPO / "demo_tiles", base / "demo")
    make_demo_archive(
        base / "tiny" / "seed1", DemoArchiveOptions(tiles_x=2, tiles_y=2, pixels=40, seed=1)
    )
    return {"demo": base / "demo", "tiny": base / "tiny"}


class Cluster:
    """A `dask scheduler` on a fixed loopback port and its `dask worker` processes, each of
    which the test may kill and start again."""

    def __init__(self, processes: list[Process], logs: Path) -> None:
        self.processes = processes
        self.logs = logs
        self.port = free_port()
        self.address = f"tcp://127.0.0.1:{self.port}"
        self.scheduler: Process | None = None
        self.workers: list[Process] = []
        self.starts = 0

    def _start(self, args: list[str], name: str) -> Process:
        self.starts += 1
        proc = Process([str(VENV_BIN / "dask"), *args], self.logs / f"{name}{self.starts}.log")
        self.processes.append(proc)
        return proc

    def start_scheduler(self) -> None:
        args = ["scheduler", "--host", "127.0.0.1", "--port", str(self.port), "--no-dashboard"]
        self.scheduler = self._start(args, "scheduler")

    def start_workers(self, n: int = 2) -> None:
        for _ in range(n):
            folder = self.logs / f"w{self.starts}"
            args = ["worker", self.address, "--nthreads", "1", "--no-dashboard"]
            args += ["--memory-limit", "2GiB", "--local-directory", str(folder)]
            self.workers.append(self._start(args, "worker"))

    def kill_scheduler(self) -> None:
        assert self.scheduler is not None
        self.scheduler.stop(signal.SIGKILL)

    def kill_workers(self) -> None:
        for worker in self.workers:
            worker.stop(signal.SIGKILL)
        self.workers = []


@pytest.fixture
def cluster(processes: list[Process], tmp_path: Path) -> Cluster:
    """A fresh scheduler with two workers."""
    started = Cluster(processes, tmp_path)
    started.start_scheduler()
    started.start_workers(2)
    return started


@pytest.fixture
def start_server(
    processes: list[Process], roots: dict[str, Path], tmp_path: Path
) -> Callable[..., Server]:
    def start(cluster: Cluster, **settings: str) -> Server:
        env = {k: v for k, v in os.environ.items() if not k.startswith("DEMAUDIT_")}
        env.update(
            {
                "DEMAUDIT_SCHEDULER": cluster.address,
                "DEMAUDIT_DATA_ROOTS": f"{roots['demo']},{roots['tiny']}",
                "DEMAUDIT_PRINCIPALS": PRINCIPALS,
                "DEMAUDIT_JOB_STORE": str(tmp_path / "jobs.sqlite"),
                "DEMAUDIT_RESULTS_DIR": str(tmp_path / "results"),
                **{f"DEMAUDIT_{k.upper()}": v for k, v in settings.items()},
            }
        )
        return Server(processes, env, tmp_path).start()

    return start


def wait_ready(http: httpx.Client, status: int, timeout: float = 60.0) -> dict[str, Any]:
    deadline = time.monotonic() + timeout
    while True:
        response = http.get("/health/ready")
        if response.status_code == status:
            body: dict[str, Any] = response.json()
            return body
        assert time.monotonic() < deadline, response.text
        time.sleep(0.2)


def run_tiny(http: httpx.Client, roots: dict[str, Path], name: str) -> dict[str, Any]:
    spec = tiny_spec(roots["tiny"] / "seed1", name)
    response = http.post(EXECUTE, json={"inputs": spec})
    assert response.status_code == 201, response.text
    return wait_until(http, response.json()["jobID"], lambda s: s["status"] in FINISHED, 120)


def test_after_a_scheduler_outage_a_new_job_succeeds_without_restarting_the_api(
    cluster, start_server, roots
):
    server = start_server(cluster, scheduler_timeout_s="3")
    with server.client() as http:
        assert run_tiny(http, roots, "before")["status"] == "successful"
        running = http.post(EXECUTE, json={"inputs": demo_spec(roots)}).json()["jobID"]
        wait_until(http, running, lambda s: s["tiles"]["done"] >= 1)

        cluster.kill_scheduler()
        ready = wait_ready(http, 503)
        assert ready["checks"]["scheduler"]["status"] == "fail"
        lost = wait_until(http, running, lambda s: s["status"] in FINISHED, 60)
        assert lost["status"] == "failed" and "connection to the Dask scheduler" in lost["message"]
        problem = http.get(f"/jobs/{running}/results").json()
        assert problem["type"] == PROBLEM + "job-failed"
        assert problem["cause"]["type"] == PROBLEM + "cluster-unavailable"
        refused = http.post(EXECUTE, json={"inputs": tiny_spec(roots["tiny"] / "seed1", "x")})
        assert refused.status_code == 503
        assert refused.json()["type"] == PROBLEM + "cluster-unavailable"
        # the API's Dask client waits 3 s for a lost scheduler, then closes for good: stay away
        # well beyond that (the outage that used to need an API restart)
        time.sleep(10)
        assert http.get("/health/live").status_code == 200
        assert wait_ready(http, 503)["checks"]["scheduler"]["status"] == "fail"

        cluster.kill_workers()  # whatever became of them without their scheduler
        cluster.start_scheduler()  # the same address
        cluster.start_workers(2)
        wait_ready(http, 200, timeout=120)
        assert run_tiny(http, roots, "after")["status"] == "successful"
    assert server.proc is not None and server.starts == 1 and server.proc.alive()


def test_a_job_whose_workers_all_die_fails_with_the_reason(cluster, start_server, roots):
    server = start_server(cluster, job_stall_timeout_s="20")
    with server.client() as http:
        job_id = http.post(EXECUTE, json={"inputs": demo_spec(roots)}).json()["jobID"]
        wait_until(http, job_id, lambda s: s["tiles"]["done"] >= 1)
        cluster.kill_workers()
        # bound of the wait, not a timing check: 20 s of stall plus the watchdog's tick
        ended = wait_until(http, job_id, lambda s: s["status"] in FINISHED, 90)
        assert ended["status"] == "failed"
        assert ended["message"] == "no tile finished for 20 s; workers: 0"
        problem = http.get(f"/jobs/{job_id}/results").json()
        assert problem["cause"]["type"] == PROBLEM + "cluster-unavailable"
        assert wait_ready(http, 503)["checks"]["workers"]["status"] == "fail"
        assert not list((server.folder / "results").glob(f"{job_id}*"))  # nothing left behind
