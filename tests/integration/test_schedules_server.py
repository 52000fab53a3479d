"""Schedules on real servers: two ``demaudit serve`` processes on one SQLite job store and one
Dask cluster, their schedulers on a fast test clock (one scheduler minute per real second), a
schedule due every minute re-checking against its last run. Each slot is handled once, by the
holder of the lease; when that process stops, the other one takes over; the CLI manages the
schedule.

Every process runs in its own session and is stopped with its group by the fixture finalizer.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import hashlib
import os
import signal
import sqlite3
import subprocess
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import httpx
import pytest
import yaml

from demaudit.workers.demo.archive import make_demo_archive
from demaudit.workers.demo.options import DemoArchiveOptions
from tests.support.processes import VENV_BIN, Process, free_port, start_dask

pytestmark = pytest.mark.slow

TOKEN = "Rk3Wm9Tq1Zx5Cv7Bn0Lp2Hs4Jd6Fg8Ka1Ey3Ui5Oo7Q"  # 43 URL-safe characters
AUTH = {"Authorization": f"Bearer {TOKEN}"}
PRINCIPAL = f"nightly:user:{hashlib.sha256(TOKEN.encode()).hexdigest()}"
SPEED = 60  # scheduler seconds per real second: a minute-by-minute cron fires every second


@pytest.fixture(scope="module")
def cluster(processes: list[Process], tmp_path_factory: pytest.TempPathFactory) -> str:
    """A Dask scheduler with one single-threaded worker (tiny jobs; two cores to share)."""
    address = start_dask(processes, tmp_path_factory.mktemp("dask"), workers=1, memory="1GiB")
    return address


@pytest.fixture(scope="module")
def archive(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, dict[str, Any]]:
    """A 2 x 2 tile archive in a data root, and its raster audit spec (relative paths)."""
    root = tmp_path_factory.mktemp("root")
    make_demo_archive(root, DemoArchiveOptions(tiles_x=2, tiles_y=2, pixels=40, seed=3))
    spec = yaml.safe_load((root / "demo.yaml").read_text())
    keep = {"test", "reference", "region", "outliers", "options"}
    return root, {"name": "nightly-tiny"} | {k: v for k, v in spec.items() if k in keep}


def start_servers(
    processes: list[Process], env: dict[str, str], folder: Path, count: int
) -> list[tuple[Process, str]]:
    """count ``demaudit serve`` processes on free ports, started together; once all are ready."""
    servers = []
    for n in range(count):
        port = free_port()
        args = [str(VENV_BIN / "demaudit"), "serve", "--host", "127.0.0.1", "--port", str(port)]
        proc = Process(args, folder / f"server{n}.log", env=env)
        processes.append(proc)
        servers.append((proc, f"http://127.0.0.1:{port}"))
    deadline = time.monotonic() + 90
    for proc, url in servers:
        while True:
            assert proc.alive(), "server exited:\n" + proc.tail()
            with contextlib.suppress(httpx.HTTPError, ValueError, KeyError):
                if httpx.get(f"{url}/health", timeout=2).json()["cluster"]["workers"] >= 1:
                    break
            assert time.monotonic() < deadline, "server not ready:\n" + proc.tail()
            time.sleep(0.2)
    return servers


def cli(*args: str) -> subprocess.CompletedProcess[str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("DEMAUDIT_")}
    return subprocess.run(
        [str(VENV_BIN / "demaudit"), *args],
        capture_output=True,
        text=True,
        timeout=60,
        env=env,
        start_new_session=True,
    )


def runs_of(store: Path, schedule_id: str) -> list[sqlite3.Row]:
    with contextlib.closing(sqlite3.connect(f"file:{store}?mode=ro", uri=True)) as db:
        db.row_factory = sqlite3.Row
        return db.execute(
            "SELECT * FROM schedule_runs WHERE schedule_id = ? ORDER BY slot", (schedule_id,)
        ).fetchall()


def jobs_of(store: Path, schedule_id: str) -> list[sqlite3.Row]:
    with contextlib.closing(sqlite3.connect(f"file:{store}?mode=ro", uri=True)) as db:
        db.row_factory = sqlite3.Row
        return db.execute("SELECT * FROM jobs WHERE schedule_id = ?", (schedule_id,)).fetchall()


def wait_until(check: Callable[[], bool], what: str, timeout: float) -> None:
    deadline = time.monotonic() + timeout
    while not check():
        assert time.monotonic() < deadline, f"timed out waiting for {what}"
        time.sleep(0.2)


def test_two_servers_on_one_store_run_each_slot_once(processes, cluster, archive, tmp_path):
    root, spec = archive
    store = tmp_path / "jobs.sqlite"
    env = {k: v for k, v in os.environ.items() if not k.startswith("DEMAUDIT_")}
    env |= {
        "DEMAUDIT_SCHEDULER": cluster,
        "DEMAUDIT_DATA_ROOTS": str(root),
        "DEMAUDIT_PRINCIPALS": PRINCIPAL,
        "DEMAUDIT_JOB_STORE": str(store),
        "DEMAUDIT_RESULTS_DIR": str(tmp_path / "results"),
        "DEMAUDIT_SCHEDULE_TICK_S": "0.1",
        "DEMAUDIT_SCHEDULE_LEASE_S": "90",  # scheduler seconds: 1.5 s of real time
        "DEMAUDIT_SCHEDULE_CLOCK_SPEED": str(SPEED),
        "DEMAUDIT_SCHEDULE_CLOCK_ANCHOR": dt.datetime.now(dt.UTC).isoformat(),
    }
    (first, first_url), (second, second_url) = start_servers(processes, env, tmp_path, 2)
    (root / "spec.yaml").write_text(yaml.safe_dump(spec))

    added = cli(
        "schedule", "add", str(root / "spec.yaml"), "--cron", "* * * * *", "--baseline",
        "latest", "--server", first_url, "--token", TOKEN,
    )  # fmt: skip
    assert added.returncode == 0, added.stderr
    schedule_id = added.stdout.split()[1]

    def handled(by: set[int] | None = None) -> list[sqlite3.Row]:
        rows = runs_of(store, schedule_id)
        return [r for r in rows if by is None or int(r["owner"].split("-")[-2]) in by]

    def successful() -> int:
        return sum(j["status"] == "successful" for j in jobs_of(store, schedule_id))

    wait_until(lambda: len(handled()) >= 5 and successful() >= 2, "five slots, two runs", 40)

    # stop whichever server holds the lease: the other one takes over at once
    owner_pid = int(handled()[-1]["owner"].split("-")[-2])
    holder, other, other_url = (
        (first, second, second_url) if owner_pid == first.popen.pid else (second, first, first_url)
    )
    assert owner_pid == holder.popen.pid
    holder.stop(signal.SIGTERM)
    before = len(handled({other.popen.pid}))
    wait_until(lambda: len(handled({other.popen.pid})) >= before + 3, "the other server", 30)

    # the CLI lists and removes schedules (a yearly one: it never runs here)
    yearly = cli(
        "schedule", "add", str(root / "spec.yaml"), "--cron", "0 0 1 1 *", "--name", "yearly",
        "--server", other_url, "--token", TOKEN,
    )  # fmt: skip
    yearly_id = yearly.stdout.split()[1]
    listed = cli("schedule", "list", "--server", other_url, "--token", TOKEN)
    assert listed.returncode == 0, listed.stderr
    assert schedule_id in listed.stdout and yearly_id in listed.stdout
    removed = cli("schedule", "remove", yearly_id, "--server", other_url, "--token", TOKEN)
    assert removed.returncode == 0 and "removed" in removed.stdout, removed.stderr

    # a webhook to the server's own machine is refused (no allow-list set): blind SSRF
    refused = cli(
        "schedule", "add", str(root / "spec.yaml"), "--cron", "0 0 1 1 *", "--webhook",
        f"{other_url}/processes", "--server", other_url, "--token", TOKEN,
    )  # fmt: skip
    assert refused.returncode == 2 and "loopback" in refused.stderr, refused.stderr

    # later runs re-check against the last successful one: nothing changed, all tiles reused
    with httpx.Client(base_url=other_url, headers=AUTH, timeout=30) as http:
        assert http.get(f"/schedules/{yearly_id}").status_code == 404
        assert [s["id"] for s in http.get("/schedules").json()["schedules"]] == [schedule_id]
        ok = [j for j in jobs_of(store, schedule_id) if j["status"] == "successful"]
        last_ok = max(ok, key=lambda j: j["created"])["job_id"]
        assert http.get(f"/jobs/{last_ok}").json()["scheduleID"] == schedule_id
        summary = http.get(f"/jobs/{last_ok}/results").json()["summary"]["value"]
    recheck = summary["recheck"]
    assert recheck["tiles_reused"] == 4 and recheck["tiles_recomputed"] == []
    assert recheck["regressions"] == 0

    # at rest: every slot handled once, one job per submitted slot, both processes took part
    other.stop(signal.SIGTERM)
    runs, jobs = runs_of(store, schedule_id), jobs_of(store, schedule_id)
    assert len({r["slot"] for r in runs}) == len(runs) >= 8
    submitted = [r for r in runs if r["outcome"] == "submitted"]
    assert sorted(r["job_id"] for r in submitted) == sorted(j["job_id"] for j in jobs)
    assert {int(r["owner"].split("-")[-2]) for r in runs} == {first.popen.pid, second.popen.pid}
    for r in runs:
        assert r["outcome"] in {"submitted", "skipped"}, dict(r)
        assert r["outcome"] == "submitted" or "still running" in r["reason"]
    print(
        f"slots handled: {len(runs)}, jobs: {len(jobs)}, "
        f"skipped: {sum(r['outcome'] == 'skipped' for r in runs)}"
    )
