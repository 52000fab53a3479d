"""deploy/: the Kubernetes manifests parse and agree with each other, the CronJob's script talks
to an API as the API answers, the systemd units and the container image say what they must, and
the nightly wrapper keeps dated folders with ``latest`` on the newest successful run."""

from __future__ import annotations

import configparser
import json
import os
import shutil
import subprocess
import threading
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import pytest
import yaml

from demaudit.service.scheduling.cron import check_cron
from demaudit.workers.spec import parse_spec

DEPLOY = Path(__file__).resolve().parents[2] / "deploy"
KUBERNETES = DEPLOY / "kubernetes"


def manifests() -> list[dict[str, Any]]:
    documents = []
    for path in sorted(KUBERNETES.glob("*.yaml")):
        if path.name == "kustomization.yaml":
            continue
        with path.open(encoding="utf-8") as f:
            documents += [d for d in yaml.safe_load_all(f) if d is not None]
    return documents


def only(kind: str, name: str) -> dict[str, Any]:
    [found] = [d for d in manifests() if d["kind"] == kind and d["metadata"]["name"] == name]
    return found


def container(workload: dict[str, Any]) -> dict[str, Any]:
    spec = workload["spec"]
    pod = spec["jobTemplate"]["spec"]["template"] if "jobTemplate" in spec else spec["template"]
    [first] = pod["spec"]["containers"]
    return dict(first)


def env_of(workload: dict[str, Any]) -> dict[str, Any]:
    return {e["name"]: e.get("value", e.get("valueFrom")) for e in container(workload)["env"]}


# --- Kubernetes ------------------------------------------------------------------------------


def test_every_manifest_parses_and_the_kustomization_lists_them():
    documents = manifests()
    assert {(d["kind"], d["metadata"]["name"]) for d in documents} == {
        ("PersistentVolumeClaim", "demaudit-dem"),
        ("PersistentVolumeClaim", "demaudit-state"),
        ("Deployment", "dask-scheduler"),
        ("Service", "dask-scheduler"),
        ("Deployment", "dask-worker"),
        ("Deployment", "demaudit-api"),
        ("Service", "demaudit-api"),
        ("ConfigMap", "demaudit-nightly"),
        ("CronJob", "demaudit-nightly"),
    }
    for document in documents:
        assert document["apiVersion"] and document["metadata"]["labels"]
    kustomization = yaml.safe_load((KUBERNETES / "kustomization.yaml").read_text())
    listed = set(kustomization["resources"])
    assert listed == {p.name for p in KUBERNETES.glob("*.yaml")} - {"kustomization.yaml"}


def test_the_cronjob_runs_nightly_never_overlapping_with_a_token_from_a_secret():
    cronjob = only("CronJob", "demaudit-nightly")
    spec = cronjob["spec"]
    assert spec["concurrencyPolicy"] == "Forbid"
    assert check_cron(spec["schedule"]) == "0 2 * * *"
    assert spec["jobTemplate"]["spec"]["backoffLimit"] == 0  # a retry would submit again
    assert spec["jobTemplate"]["spec"]["template"]["spec"]["restartPolicy"] == "Never"
    env = env_of(cronjob)
    assert env["DEMAUDIT_TOKEN"] == {"secretKeyRef": {"name": "demaudit-api-token", "key": "token"}}
    assert env["DEMAUDIT_URL"] == "http://demaudit-api:8000"
    assert container(cronjob)["image"].startswith("curlimages/curl:")
    config = only("ConfigMap", "demaudit-nightly")["data"]
    parse_spec(json.loads(config["execute.json"])["inputs"])  # a valid job spec


def test_the_api_finds_the_dask_scheduler_and_its_services_select_their_pods():
    api = only("Deployment", "demaudit-api")
    env = env_of(api)
    scheduler_service = only("Service", "dask-scheduler")
    port = scheduler_service["spec"]["ports"][0]["port"]
    assert env["DEMAUDIT_SCHEDULER"] == f"tcp://dask-scheduler:{port}"
    assert "tcp://dask-scheduler:8786" in container(only("Deployment", "dask-worker"))["command"]
    assert env["DEMAUDIT_PRINCIPALS_FILE"] == "/etc/demaudit/principals"
    mounts = {m["name"]: m for m in container(api)["volumeMounts"]}
    volumes = {v["name"]: v for v in api["spec"]["template"]["spec"]["volumes"]}
    assert mounts["principals"]["mountPath"] == "/etc/demaudit"
    assert volumes["principals"]["secret"]["secretName"] == "demaudit-principals"
    assert {"DEMAUDIT_DATA_ROOTS", "DEMAUDIT_JOB_STORE", "DEMAUDIT_RESULTS_DIR"} <= env.keys()
    assert api["spec"]["replicas"] == 1 and api["spec"]["strategy"]["type"] == "Recreate"
    for name in ("demaudit-api", "dask-scheduler"):
        deployment, service = only("Deployment", name), only("Service", name)
        pod_labels = deployment["spec"]["template"]["metadata"]["labels"]
        assert service["spec"]["selector"].items() <= pod_labels.items()
        assert deployment["spec"]["selector"]["matchLabels"].items() <= pod_labels.items()
        names = {p["name"] for p in container(deployment)["ports"]}
        assert {p["targetPort"] for p in service["spec"]["ports"]} <= names
    probe = container(api)["readinessProbe"]["httpGet"]
    assert probe == {"path": "/health/ready", "port": "http"}
    assert container(api)["livenessProbe"]["httpGet"] == {"path": "/health/live", "port": "http"}


def test_api_and_workers_run_one_image_and_see_the_tiles_at_one_path():
    api, worker = only("Deployment", "demaudit-api"), only("Deployment", "dask-worker")
    scheduler = only("Deployment", "dask-scheduler")
    assert container(api)["image"] == container(worker)["image"] == container(scheduler)["image"]
    roots = env_of(api)["DEMAUDIT_DATA_ROOTS"]
    for workload in (api, worker):
        mounts = {m["mountPath"]: m for m in container(workload)["volumeMounts"]}
        assert mounts[roots]["readOnly"] is True


@pytest.fixture
def fake_api() -> Iterator[dict[str, Any]]:
    """An HTTP server answering as the API does: 201 with a Location, then a status document
    that says running once and successful after."""
    seen: dict[str, Any] = {"posts": [], "gets": 0}

    class Handler(BaseHTTPRequestHandler):
        def do_POST(self) -> None:  # noqa: N802
            body = self.rfile.read(int(self.headers["Content-Length"]))
            seen["posts"].append((self.path, dict(self.headers), json.loads(body)))
            self.send_response(201)
            self.send_header("Location", f"http://127.0.0.1:{port}/jobs/abc123")
            self.send_header("Content-Length", "2")
            self.end_headers()
            self.wfile.write(b"{}")

        def do_GET(self) -> None:  # noqa: N802
            seen["gets"] += 1
            status = "running" if seen["gets"] == 1 else "successful"
            document = json.dumps({"jobID": "abc123", "status": status}).replace(" ", "")
            self.send_response(200)
            self.send_header("Content-Length", str(len(document)))
            self.end_headers()
            self.wfile.write(document.encode())

        def log_message(self, *args: Any) -> None:
            pass

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    port = server.server_address[1]
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05})
    thread.start()
    seen["url"] = f"http://127.0.0.1:{port}"
    yield seen
    server.shutdown()
    server.server_close()
    thread.join(5)


@pytest.mark.skipif(shutil.which("curl") is None, reason="needs curl")
def test_the_cronjob_script_submits_and_follows_the_job(fake_api, tmp_path):
    config = only("ConfigMap", "demaudit-nightly")["data"]
    folder = tmp_path / "etc"
    folder.mkdir()
    for name, text in config.items():
        (folder / name).write_text(text)
    script = config["submit.sh"].replace("/etc/demaudit-nightly", str(folder))
    env = {
        "PATH": os.environ["PATH"],
        "DEMAUDIT_URL": fake_api["url"],
        "DEMAUDIT_TOKEN": "nightly-token-0123456789",
        "POLL_SECONDS": "0",
    }
    done = subprocess.run(["sh", "-c", script], env=env, capture_output=True, text=True, timeout=30)
    assert done.returncode == 0, done.stderr
    assert "job successful" in done.stdout
    [(path, headers, body)] = fake_api["posts"]
    assert path == "/processes/dem-audit/execution"
    assert headers["Authorization"] == "Bearer nightly-token-0123456789"
    assert body["inputs"]["name"] == "release-2026-11-nightly"
    assert fake_api["gets"] == 2


# --- systemd and the image --------------------------------------------------------------------


def unit(name: str) -> configparser.ConfigParser:
    parser = configparser.ConfigParser(strict=False, interpolation=None)
    parser.optionxform = str  # type: ignore[assignment,method-assign]
    parser.read(DEPLOY / "systemd" / name)
    return parser


def test_the_timer_starts_the_recheck_nightly_and_catches_up_once():
    timer = unit("demaudit-recheck.timer")
    assert timer["Timer"]["OnCalendar"] == "*-*-* 02:00:00 UTC"
    assert timer["Timer"]["Persistent"] == "true"
    assert timer["Timer"]["Unit"] == "demaudit-recheck.service"
    assert timer["Install"]["WantedBy"] == "timers.target"
    service = unit("demaudit-recheck.service")["Service"]
    assert service["Type"] == "oneshot"  # never two at once
    assert service["ExecStart"].split()[0].endswith("deploy/nightly-recheck.sh")
    assert "RECHECK_COMMAND=" in service["Environment"]


def test_the_image_is_debian_python_with_the_geoid_grid_and_the_package():
    text = (DEPLOY / "Dockerfile").read_text()
    assert "FROM python:3.11-slim-bookworm" in text
    assert "apt-get install -y --no-install-recommends proj-data" in text
    assert "pip install --no-cache-dir --disable-pip-version-check ." in text
    ignore = (DEPLOY / "Dockerfile.dockerignore").read_text().split()
    assert {"!service/", "!workers/", "!pyproject.toml", "!README.md"} <= set(ignore)


# --- the nightly wrapper --------------------------------------------------------------------------

FAKE_DEMAUDIT = """#!/usr/bin/env bash
# stands in for `demaudit run SPEC --out DIR [--baseline DIR] --quiet`: logs its arguments,
# writes summary.json unless FAKE_EXIT is 2 or more, exits FAKE_EXIT
echo "$*" >> "$FAKE_LOG"
out=""
while [ $# -gt 0 ]; do
  [ "$1" = "--out" ] && out=$2
  shift
done
mkdir -p "$out/results.zarr"
[ "${FAKE_EXIT:-0}" -ge 2 ] || echo '{}' > "$out/summary.json"
exit "${FAKE_EXIT:-0}"
"""


def test_the_wrapper_keeps_dated_runs_and_points_latest_at_the_newest_success(tmp_path):
    fake = tmp_path / "demaudit"
    fake.write_text(FAKE_DEMAUDIT)
    fake.chmod(0o755)
    log = tmp_path / "calls.log"
    root = tmp_path / "nightly"

    def night(stamp: str, exit_status: int = 0, keep: int = 14) -> int:
        env = {
            "PATH": os.environ["PATH"],
            "RECHECK_COMMAND": str(fake),
            "RECHECK_STAMP": stamp,
            "RECHECK_KEEP": str(keep),
            "FAKE_LOG": str(log),
            "FAKE_EXIT": str(exit_status),
        }
        done = subprocess.run(
            ["bash", str(DEPLOY / "nightly-recheck.sh"), "/srv/dem/job.yaml", str(root)],
            env=env,
            capture_output=True,
            text=True,
            timeout=30,
        )
        return done.returncode

    assert night("2026-11-02T020000Z") == 0
    assert night("2026-11-03T020000Z") == 0
    calls = log.read_text().splitlines()
    assert calls[0] == f"run /srv/dem/job.yaml --out {root}/2026-11-02T020000Z --quiet"
    assert calls[1].endswith(f"--baseline {root}/2026-11-02T020000Z")
    assert os.readlink(root / "latest") == "2026-11-03T020000Z"  # relative: the root may move

    assert night("2026-11-04T020000Z", exit_status=2) == 2  # no results: latest stays
    assert os.readlink(root / "latest") == "2026-11-03T020000Z"
    assert (root / "2026-11-04T020000Z.failed").is_dir()
    assert night("2026-11-05T020000Z", exit_status=1) == 1  # some tiles failed: still a run
    assert log.read_text().splitlines()[-1].endswith(f"--baseline {root}/2026-11-03T020000Z")
    assert os.readlink(root / "latest") == "2026-11-05T020000Z"

    assert night("2026-11-06T020000Z", exit_status=3, keep=2) == 3
    kept = sorted(p.name for p in root.iterdir())
    assert kept == ["2026-11-05T020000Z", "2026-11-06T020000Z.failed", "latest"]
    assert night("2026-11-05T020000Z") == 73  # an existing run folder is never overwritten


def test_deployed_workers_get_the_thread_and_cache_settings_of_local_workers():
    from demaudit.service.run.cluster import WORKER_ENV

    worker = only("Deployment", "dask-worker")
    assert {k: str(v) for k, v in env_of(worker).items() if k in WORKER_ENV} == WORKER_ENV
    compose = yaml.safe_load((DEPLOY / "compose.yaml").read_text())
    assert compose["services"]["worker"]["environment"] == WORKER_ENV


def test_deployed_schedulers_slow_down_dasks_housekeeping_as_the_local_one():
    from demaudit.service.run.cluster import SCHEDULER_ENV

    scheduler = only("Deployment", "dask-scheduler")
    assert SCHEDULER_ENV  # the tick and the system monitor
    assert {k: str(v) for k, v in env_of(scheduler).items() if k in SCHEDULER_ENV} == SCHEDULER_ENV
    compose = yaml.safe_load((DEPLOY / "compose.yaml").read_text())
    assert compose["services"]["scheduler"]["environment"] == SCHEDULER_ENV
