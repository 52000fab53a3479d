"""Two API processes sharing one job store (issue 14 item 5): real ``demaudit serve`` processes
on loopback, one SQLite store and one results folder, one Dask scheduler with two workers.
Restarting one process fails only the jobs it ran, and removes their partial outputs; the
other's jobs run on to success."""

from __future__ import annotations

import os
import shutil
import time
from collections.abc import Callable
from pathlib import Path

import pytest

from demaudit.service.run.faults import RESTART_MESSAGE
from tests.integration.test_rest_server import (
    EXECUTE,
    PRINCIPALS,
    REPO,
    Server,
    demo_spec,
    wait_until,
)
from tests.support.processes import Process, start_dask

pytestmark = pytest.mark.slow

FINISHED = {"successful", "failed", "dismissed"}


@pytest.fixture(scope="module")
def roots(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    base = tmp_path_factory.mktemp("roots")
    shutil.copytree(REPO / "demo_tiles", base / "demo")
    return {"demo": base / "demo"}


@pytest.fixture
def start_server(
    processes: list[Process], roots: dict[str, Path], tmp_path: Path
) -> Callable[[str], Server]:
    """start_server(name) -> a server on the shared store, results folder and cluster."""
    address = start_dask(processes, tmp_path, workers=2, memory="2GiB")
    env = {k: v for k, v in os.environ.items() if not k.startswith("DEMAUDIT_")}
    env.update(
        {
            "DEMAUDIT_SCHEDULER": address,
            "DEMAUDIT_DATA_ROOTS": str(roots["demo"]),
            "DEMAUDIT_PRINCIPALS": PRINCIPALS,
            "DEMAUDIT_JOB_STORE": str(tmp_path / "jobs.sqlite"),
            "DEMAUDIT_RESULTS_DIR": str(tmp_path / "results"),
            "DEMAUDIT_MAX_RUNNING_JOBS": "1",
        }
    )

    def start(name: str) -> Server:
        logs = tmp_path / name
        logs.mkdir()
        return Server(processes, env, logs).start()

    return start


def test_restarting_one_api_process_leaves_the_other_s_jobs_running_to_success(
    start_server, roots, tmp_path
):
    left, right = start_server("left"), start_server("right")
    results = tmp_path / "results"
    with left.client() as http:
        # one job runs, the next waits for the slot: both must outlive the neighbour's restart
        theirs = [http.post(EXECUTE, json={"inputs": demo_spec(roots)}).json()["jobID"]]
        theirs.append(http.post(EXECUTE, json={"inputs": demo_spec(roots)}).json()["jobID"])
    with right.client() as http:
        mine = http.post(EXECUTE, json={"inputs": demo_spec(roots)}).json()["jobID"]
        wait_until(http, mine, lambda s: s["tiles"]["done"] >= 1, timeout=120)
    assert (results / f"{mine}.partial-{mine}").is_dir()  # its result being built

    right.kill()  # SIGKILL: nothing is cleaned up on the way out
    right.start()

    with right.client() as http:
        killed = http.get(f"/jobs/{mine}").json()
        assert (killed["status"], killed["message"]) == ("failed", RESTART_MESSAGE)
        assert http.get(f"/jobs/{mine}/results").json()["cause"]["type"].endswith("interrupted")
        queued_elsewhere = http.get(f"/jobs/{theirs[1]}").json()
        assert queued_elsewhere["status"] in ("accepted", "running")  # the restart reproduced
    # its partial folder went with it; a tile task still running when the process died may
    # write it again after the removal: the watchdog's next tick (2 s) removes it then
    deadline = time.monotonic() + 30
    while list(results.glob(f"{mine}*")) and time.monotonic() < deadline:
        time.sleep(0.2)
    assert not list(results.glob(f"{mine}*"))

    with left.client() as http:
        for job_id in theirs:
            ended = wait_until(http, job_id, lambda s: s["status"] in FINISHED, timeout=300)
            assert ended["status"] == "successful", ended
            assert http.get(f"/jobs/{job_id}/results").status_code == 200
    assert sorted(p.name for p in results.iterdir()) == sorted(theirs)
