"""The REST service as deployed: real ``demaudit serve`` processes on loopback, a real Dask
scheduler with two worker processes, the demo archive copied into a data root.

Every process is started in its own session and killed with its group by a fixture finalizer, so
nothing outlives a failing test.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import signal
import subprocess
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
import yaml

from demaudit.service.run.runner import run_job
from demaudit.workers import spec as job_spec
from demaudit.workers.demo.archive import make_demo_archive
from demaudit.workers.demo.options import DemoArchiveOptions
from tests.support.processes import VENV_BIN, Process, free_port, start_dask

pytestmark = pytest.mark.slow

REPO = Path(__file__).resolve().parents[2]
TOKEN = "s2mCq1fVn0dJ7HkR4wX9yZbT3uA6eL8pQoGiNcEjKhM"  # alice (43 URL-safe characters)
OTHER_TOKEN = "Yq8Jt3Rw0Lz5Nc7Vb2Mx4Kp6Hd9Fs1Ga3Eu5Wi7Oy0T"  # bob
LEGACY_TOKEN = "Pn4Bx8Cv2Zl6Kj0Hg3Fd7Sa5Qw9Er1Ty3Ui5Op7As0D"  # a deprecated plain token
AUTH = {"Authorization": f"Bearer {TOKEN}"}
PRINCIPALS = ",".join(
    f"{name}:user:{hashlib.sha256(token.encode()).hexdigest()}"
    for name, token in [("alice", TOKEN), ("bob", OTHER_TOKEN)]
)
OGC = "http://www.opengis.net/def/exceptions/ogcapi-processes-1/1.0/"
EXECUTE = "/processes/dem-audit/execution"
FINISHED = {"successful", "failed", "dismissed"}


@pytest.fixture(scope="module")
def scheduler(processes: list[Process], tmp_path_factory: pytest.TempPathFactory) -> str:
    """Address of a Dask scheduler process with two single-threaded worker processes."""
    address = start_dask(processes, tmp_path_factory.mktemp("dask"), workers=2, memory="2GiB")
    from distributed import Client

    with Client(address, timeout="30s") as client:
        client.wait_for_workers(2, timeout=60)
    return address


@pytest.fixture(scope="module")
def dask(scheduler: str) -> Iterator[Any]:
    """A client of the test itself on the same cluster (direct runs, task inspection)."""
    from distributed import Client

    with Client(scheduler, timeout="30s") as client:
        yield client


@pytest.fixture(scope="module")
def roots(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """Data roots: a copy of the demo archive (first root) and two tiny archives; beside them
    a folder outside the roots and a symlink escaping into it."""
    base = tmp_path_factory.mktemp("roots")
    demo = base / "demo"
    shutil.copytree(REPO / "demo_tiles", demo)
    tiny = base / "tiny"
    for seed in (1, 2):
        make_demo_archive(
            tiny / f"seed{seed}", DemoArchiveOptions(tiles_x=2, tiles_y=2, pixels=40, seed=seed)
        )
    outside = base / "outside"
    outside.mkdir()
    shutil.copy(next((demo / "release_2026_11").glob("*.tif")), outside / "stolen.tif")
    os.symlink(outside, demo / "escape")
    return {"demo": demo, "tiny": tiny, "outside": outside}


class Server:
    """``demaudit serve`` on a free loopback port."""

    def __init__(self, processes: list[Process], env: dict[str, str], folder: Path) -> None:
        self.processes = processes
        self.env = env
        self.folder = folder
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.proc: Process | None = None
        self.starts = 0

    def start(self) -> Server:
        self.starts += 1
        args = [
            str(VENV_BIN / "demaudit"),
            "serve",
            "--host",
            "127.0.0.1",
            "--port",
            str(self.port),
        ]
        self.proc = Process(args, self.folder / f"server{self.starts}.log", env=self.env)
        self.processes.append(self.proc)
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            assert self.proc.alive(), "server exited:\n" + self.proc.tail()
            try:
                health = httpx.get(f"{self.url}/health", timeout=2).json()
                if health["cluster"]["workers"] == 2:
                    return self
            except (httpx.HTTPError, ValueError):
                pass
            time.sleep(0.2)
        raise AssertionError("server did not become ready:\n" + self.proc.tail())

    def kill(self) -> None:
        assert self.proc is not None
        self.proc.stop(signal.SIGKILL)

    def client(self, token: str = TOKEN, **kwargs: Any) -> httpx.Client:
        headers = {"Authorization": f"Bearer {token}"}
        return httpx.Client(base_url=self.url, headers=headers, timeout=30, **kwargs)


@pytest.fixture(scope="module")
def start_server(
    processes: list[Process],
    scheduler: str,
    roots: dict[str, Path],
    tmp_path_factory: pytest.TempPathFactory,
) -> Callable[..., Server]:
    def start(**settings: str) -> Server:
        folder = tmp_path_factory.mktemp("server")
        env = {k: v for k, v in os.environ.items() if not k.startswith("DEMAUDIT_")}
        env.update(
            {
                "DEMAUDIT_SCHEDULER": scheduler,
                "DEMAUDIT_DATA_ROOTS": f"{roots['demo']},{roots['tiny']}",
                "DEMAUDIT_PRINCIPALS": PRINCIPALS,
                "DEMAUDIT_API_TOKENS": LEGACY_TOKEN,
                "DEMAUDIT_JOB_STORE": str(folder / "jobs.sqlite"),
                "DEMAUDIT_RESULTS_DIR": str(folder / "results"),
                **{f"DEMAUDIT_{k.upper()}": v for k, v in settings.items()},
            }
        )
        return Server(processes, env, folder).start()

    return start


@pytest.fixture(scope="module")
def server(start_server: Callable[..., Server]) -> Server:
    """The server most tests share."""
    return start_server()


def demo_spec(roots: dict[str, Path]) -> dict[str, Any]:
    spec: dict[str, Any] = yaml.safe_load((roots["demo"] / "demo.yaml").read_text())
    return spec


def tiny_spec(folder: Path, name: str) -> dict[str, Any]:
    """The tiny archive's raster audit (absolute paths: it lies in the second data root), without
    checkpoints or land cover, to keep twenty jobs quick."""
    spec: dict[str, Any] = yaml.safe_load((folder / "demo.yaml").read_text())
    keep = {"test", "reference", "region", "outliers", "options"}
    spec = {key: value for key, value in spec.items() if key in keep}
    spec["name"] = name
    for key in ("test", "reference"):
        spec[key]["tiles"] = str(folder / spec[key]["tiles"])
    spec["region"]["file"] = str(folder / spec["region"]["file"])
    return spec


def direct_run(dask: Any, spec: dict[str, Any], base_dir: Path, out: Path) -> dict[str, Any]:
    job = job_spec.resolve(job_spec.parse_spec(spec), base_dir=base_dir)
    return run_job(job, out, client=dask, run_id=f"direct{out.name}")


def wait_until(
    http: httpx.Client,
    job_id: str,
    predicate: Callable[[dict[str, Any]], bool],
    timeout: float = 60.0,
) -> dict[str, Any]:
    deadline = time.monotonic() + timeout
    while True:
        status: dict[str, Any] = http.get(f"/jobs/{job_id}").json()
        if predicate(status):
            return status
        assert time.monotonic() < deadline, f"job {job_id} stuck: {status}"
        time.sleep(0.05)


def assert_same_statistics(got: dict[str, Any], want: dict[str, Any]) -> None:
    """Equal counts; other statistics equal up to the order tile summaries were merged in."""
    assert got.keys() == want.keys()
    for key, value in want.items():
        if isinstance(value, float):
            assert got[key] == pytest.approx(value, rel=1e-9, abs=1e-12), key
        else:
            assert got[key] == value, key


def assert_same_results(got: dict[str, Any], want: dict[str, Any]) -> None:
    assert_same_statistics(got["overall"], want["overall"])
    assert [r["region"] for r in got["regions"]] == [r["region"] for r in want["regions"]]
    for mine, theirs in zip(got["regions"], want["regions"], strict=True):
        assert_same_statistics(mine["stats"], theirs["stats"])
    assert got["job"]["spec"] == want["job"]["spec"]


def cli(*args: str, timeout: float = 120) -> subprocess.CompletedProcess[str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("DEMAUDIT_")}
    return subprocess.run(
        [str(VENV_BIN / "demaudit"), *args],
        capture_output=True,
        text=True,
        timeout=timeout,
        env=env,
        start_new_session=True,
    )


# --- the tests ---------------------------------------------------------------------------------


def test_the_demo_over_http_equals_a_direct_run(server, dask, roots, tmp_path):
    submitted = cli(
        "submit", str(roots["demo"] / "demo.yaml"), "--server", server.url, "--token", TOKEN
    )
    assert submitted.returncode == 0, submitted.stderr
    job_id = submitted.stdout.split()[1]

    direct = direct_run(dask, demo_spec(roots), roots["demo"], tmp_path / "0")

    watched = cli(
        "status", job_id, "--server", server.url, "--token", TOKEN, "--watch", "--interval", "0.2"
    )
    assert watched.returncode == 0, watched.stdout + watched.stderr
    assert "36/36" in watched.stderr  # the tqdm bar reached every tile
    with server.client() as http:
        status = http.get(f"/jobs/{job_id}").json()
        assert status["status"] == "successful" and status["progress"] == 100
        results = http.get(f"/jobs/{job_id}/results").json()
        assert_same_results(results["summary"]["value"], direct)
        region = http.get(f"/jobs/{job_id}/regions/HF").json()
        assert (
            region["stats"]["count"]
            == next(r for r in direct["regions"] if r["region"] == "HF")["stats"]["count"]
        )
        tile = http.get(f"/jobs/{job_id}/tiles/{direct['tiles'][0]['tile']}").json()
        assert_same_statistics(tile["stats"], direct["tiles"][0]["stats"])
        zarr_json = http.get(results["results"]["href"] + "/zarr.json")
        assert zarr_json.status_code == 200 and zarr_json.json()["zarr_format"] == 3


def test_security_and_the_standards_problems(server, roots):
    with httpx.Client(base_url=server.url, timeout=30) as anonymous:
        for path in ("/jobs", "/processes", "/"):
            assert anonymous.get(path).status_code == 401
        assert anonymous.post(EXECUTE, json={"inputs": demo_spec(roots)}).status_code == 401
    with server.client() as http:
        for field, pattern in [
            ("test", "../outside/*.tif"),
            ("reference", "escape/*.tif"),
            ("test", str(roots["outside"] / "stolen.tif")),
        ]:
            spec = demo_spec(roots)
            spec[field]["tiles"] = pattern
            response = http.post(EXECUTE, json={"inputs": spec})
            assert response.status_code == 403, response.text
            assert response.json()["detail"].startswith(f"{field}.tiles")
        missing = http.get("/jobs/ffffffffffffffffffffffffffffffff")
        assert missing.status_code == 404 and missing.json()["type"] == OGC + "no-such-job"
        assert http.get("/processes/other").json()["type"] == OGC + "no-such-process"
        big = http.post(
            EXECUTE, content=b"x" * 2_000_000, headers={"Content-Type": "application/json"}
        )
        assert big.status_code == 413


def test_dismissing_a_running_job_cancels_its_tasks(server, dask, roots):
    with server.client() as http:
        response = http.post(
            EXECUTE, json={"inputs": demo_spec(roots)}, headers={"Prefer": "respond-async"}
        )
        assert response.status_code == 201
        job_id = response.json()["jobID"]
        not_ready = http.get(f"/jobs/{job_id}/results")
        assert not_ready.status_code == 404
        assert not_ready.json()["type"] == OGC + "result-not-ready"
        wait_until(http, job_id, lambda s: s["tiles"]["done"] >= 1)
        for token in (OTHER_TOKEN, LEGACY_TOKEN):  # other principals: no such job for them
            with server.client(token) as other:
                assert other.get(f"/jobs/{job_id}").status_code == 404
                assert other.delete(f"/jobs/{job_id}").status_code == 404
                assert job_id not in [j["jobID"] for j in other.get("/jobs").json()["jobs"]]

        dismissed = http.delete(f"/jobs/{job_id}").json()
        assert dismissed["status"] == "dismissed"
        ended = wait_until(http, job_id, lambda s: "cancelled" in s["message"], timeout=30)
        assert ended["status"] == "dismissed" and ended["tiles"]["done"] < 36

        def tasks_of_the_job() -> list[str]:
            keys: list[str] = dask.run_on_scheduler(
                lambda dask_scheduler: [str(k) for k in dask_scheduler.tasks]
            )
            return [k for k in keys if job_id in k]

        deadline = time.monotonic() + 10
        while tasks_of_the_job():
            assert time.monotonic() < deadline, tasks_of_the_job()
            time.sleep(0.1)
        assert http.get(f"/jobs/{job_id}/results").status_code == 410
        assert not (server.folder / "results" / job_id).exists()
        listed = http.get("/jobs", params={"status": "dismissed"}).json()["jobs"]
        assert job_id in [j["jobID"] for j in listed]


def test_a_server_killed_mid_job_leaves_the_job_failed_with_the_reason(start_server, roots):
    server = start_server()
    with server.client() as http:
        job_id = http.post(EXECUTE, json={"inputs": demo_spec(roots)}).json()["jobID"]
        wait_until(http, job_id, lambda s: s["tiles"]["done"] >= 1)
    server.kill()
    server.start()
    with server.client() as http:
        status = http.get(f"/jobs/{job_id}").json()
        assert status["status"] == "failed"
        assert status["message"] == "server restarted while the job ran"
        assert status["finished"] is not None
        assert http.get(f"/jobs/{job_id}/results").status_code == 409


def test_twenty_jobs_at_once_give_independent_correct_results(server, dask, roots, tmp_path):
    folders = [roots["tiny"] / "seed1", roots["tiny"] / "seed2"]
    with server.client() as http:
        ids = []
        for n in range(20):
            spec = tiny_spec(folders[n % 2], f"tiny-{n:02d}")
            response = http.post(EXECUTE, json={"inputs": spec})
            assert response.status_code == 201, response.text
            ids.append(response.json()["jobID"])
        want = [
            direct_run(dask, tiny_spec(f, "direct"), f, tmp_path / str(k))
            for k, f in enumerate(folders)
        ]
        assert want[0]["overall"]["median"] != want[1]["overall"]["median"]
        for n, job_id in enumerate(ids):
            status = wait_until(http, job_id, lambda s: s["status"] in FINISHED, timeout=120)
            assert status["status"] == "successful", status
            summary = http.get(f"/jobs/{job_id}/results").json()["summary"]["value"]
            assert summary["job"]["name"] == f"tiny-{n:02d}"
            assert_same_statistics(summary["overall"], want[n % 2]["overall"])
            for mine, theirs in zip(summary["regions"], want[n % 2]["regions"], strict=True):
                assert_same_statistics(mine["stats"], theirs["stats"])
        metrics = http.get("/metrics").text
        assert "demaudit_queue_length 0.0" in metrics


# --- fuzzing from the OpenAPI document -----------------------------------------------------------


@pytest.fixture(scope="module")
def fuzz_target(start_server: Callable[..., Server]) -> Server:
    """A server of its own, so that jobs the fuzzer manages to start disturb no other test."""
    return start_server(max_running_jobs="1")


def test_the_openapi_fuzzer_finds_no_server_error(fuzz_target):
    """Schema-valid and schema-breaking requests to every operation (a token on most), bounded
    in examples and time: no answer may be a 5xx."""
    import hypothesis
    import schemathesis
    from schemathesis import GenerationMode
    from schemathesis.checks import not_a_server_error

    schema = schemathesis.openapi.from_url(f"{fuzz_target.url}/openapi.json")
    failures: list[str] = []
    started = time.monotonic()
    requests = 0
    for result in schema.get_all_operations():
        operation = result.ok()
        for mode in (GenerationMode.POSITIVE, GenerationMode.NEGATIVE):

            @hypothesis.settings(
                max_examples=15,
                deadline=None,
                database=None,
                suppress_health_check=list(hypothesis.HealthCheck),
                phases=[hypothesis.Phase.generate],
            )
            @hypothesis.given(case=operation.as_strategy(mode))
            def exercise(case: Any) -> None:
                nonlocal requests
                requests += 1
                headers = None if requests % 7 == 0 else AUTH  # now and then without a token
                response = case.call(base_url=fuzz_target.url, headers=headers, timeout=30)
                if response.status_code >= 500:
                    failures.append(
                        f"{case.method} {case.formatted_path} -> "
                        f"{response.status_code}: {response.text[:300]}"
                    )
                case.validate_response(response, checks=[not_a_server_error])

            try:
                exercise()
            except hypothesis.errors.Unsatisfiable:
                assert mode == GenerationMode.NEGATIVE  # nothing to break (no parameters)
    elapsed = time.monotonic() - started
    assert not failures, failures
    assert requests >= 36, requests  # its time is printed below, never asserted (load varies)
    with fuzz_target.client() as http:  # leave the cluster idle for whatever runs next
        waiting = {"limit": 1000, "status": ["accepted", "running"]}
        for job in http.get("/jobs", params=waiting).json()["jobs"]:
            if job["status"] not in FINISHED:
                http.delete(f"/jobs/{job['jobID']}")
    print(json.dumps({"fuzz_requests": requests, "seconds": round(elapsed, 1)}))
