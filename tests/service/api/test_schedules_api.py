"""The /schedules resource on a TestClient: create, list, read, delete; tokens; problem
documents for bad requests; scheduled runs as ordinary jobs (a frozen scheduler clock)."""

from __future__ import annotations

import contextlib
import datetime as dt
import json
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import pytest
from fastapi.testclient import TestClient

from demaudit.service.api.app import create_app
from demaudit.service.cli import main as cli
from demaudit.service.cli import remote
from demaudit.service.settings import Settings
from demaudit.service.store.jobs import MemoryJobStore
from tests.service.tokens import AUTH, UNKNOWN_TOKEN

T0 = dt.datetime(2026, 11, 1, 12, 0, tzinfo=dt.UTC)
OWN = "urn:demaudit:problem:"


class FrozenClock:
    def __init__(self, now: dt.datetime) -> None:
        self.now = now

    def __call__(self) -> dt.datetime:
        return self.now


@pytest.fixture
def clock() -> FrozenClock:
    return FrozenClock(T0)


@pytest.fixture
def frozen_api(
    settings: Settings, runner, cluster_factory, clock, resolver
) -> Iterator[TestClient]:
    """The app with the scripted runner, its scheduler on the frozen clock; the loop never
    ticks by itself (the tests call app.state.scheduler.tick())."""
    quiet = settings.model_copy(update={"schedule_tick_s": 3600.0, "schedule_lease_s": 7200.0})
    app = create_app(
        quiet,
        store=MemoryJobStore(),
        runner=runner,
        client_factory=cluster_factory,
        clock=clock,
        webhook_resolver=resolver,
    )
    with TestClient(app, headers=AUTH) as client:
        yield client


def body(spec: dict[str, Any], **changes: Any) -> dict[str, Any]:
    return {"name": "nightly re-check", "cron": "0 2 * * *", "inputs": spec} | changes


def assert_problem(response, status: int, type_: str | None = None) -> dict[str, Any]:
    assert response.status_code == status, response.text
    assert response.headers["content-type"].startswith("application/problem+json")
    problem: dict[str, Any] = response.json()
    assert problem["status"] == status and problem["detail"]
    if type_ is not None:
        assert problem["type"] == type_
    return problem


# --- the resource ---------------------------------------------------------------------------------


def test_create_read_list_and_delete_a_schedule(frozen_api, spec):
    created = frozen_api.post(
        "/schedules",
        json=body(
            spec, cron=" 0  2 * * * ", webhook="https://hooks.example.org/dem", notify="always"
        ),
    )
    assert created.status_code == 201, created.text
    schedule = created.json()
    url = f"http://testserver/schedules/{schedule['id']}"
    assert created.headers["Location"] == url
    assert schedule["cron"] == "0 2 * * *" and schedule["notify"] == "always"
    assert schedule["timezone"] == "UTC"
    assert schedule["webhook"] == "https://hooks.example.org/***"  # the path may hold a secret
    assert schedule["owner"] == "alice" and len(schedule.pop("webhookSecret")) >= 43
    assert schedule["baseline"] is None and schedule["inputs"]["name"] == spec["name"]
    assert schedule["nextRun"] == "2026-11-02T02:00:00Z"
    assert schedule["lastRun"] is None and schedule["runs"] == []
    assert {link["rel"]: link["href"] for link in schedule["links"]}["self"] == url

    assert frozen_api.get(f"/schedules/{schedule['id']}").json() == schedule
    listed = frozen_api.get("/schedules").json()
    assert listed["numberMatched"] == 1 and listed["schedules"][0]["id"] == schedule["id"]
    assert "runs" not in listed["schedules"][0]

    deleted = frozen_api.delete(f"/schedules/{schedule['id']}")
    assert deleted.status_code == 204 and deleted.content == b""
    assert_problem(frozen_api.get(f"/schedules/{schedule['id']}"), 404, OWN + "no-such-schedule")
    assert_problem(frozen_api.delete(f"/schedules/{schedule['id']}"), 404)
    assert frozen_api.get("/schedules").json()["numberMatched"] == 0


def test_schedules_are_paged_oldest_first(frozen_api, spec, clock):
    ids = []
    for n in range(3):
        clock.now = T0 + dt.timedelta(minutes=n)
        ids.append(frozen_api.post("/schedules", json=body(spec, name=f"s{n}")).json()["id"])
    page = frozen_api.get("/schedules", params={"limit": 2}).json()
    assert [s["id"] for s in page["schedules"]] == ids[:2] and page["numberReturned"] == 2
    following = next(link["href"] for link in page["links"] if link["rel"] == "next")
    assert [s["id"] for s in frozen_api.get(following).json()["schedules"]] == ids[2:]


@pytest.mark.parametrize(
    ("method", "path"),
    [("get", "/schedules"), ("post", "/schedules"), ("get", "/schedules/x"),
     ("delete", "/schedules/x")],
)  # fmt: skip
@pytest.mark.parametrize("auth", [None, f"Bearer {UNKNOWN_TOKEN}"])
def test_schedules_need_a_valid_token(frozen_api, spec, method, path, auth):
    headers = {"Authorization": auth} if auth else {"Authorization": ""}
    kwargs: dict[str, Any] = {"headers": headers}
    if method == "post":
        kwargs["json"] = body(spec)
    response = getattr(frozen_api, method)(path, **kwargs)
    assert_problem(response, 401, OWN + "unauthorized")
    assert response.headers["www-authenticate"].startswith("Bearer")


@pytest.mark.parametrize(
    ("changes", "field", "words"),
    [
        ({"cron": "0 2 * *"}, "body.cron", "five fields"),
        ({"cron": "0 0 2 * * *"}, "body.cron", "five fields"),
        ({"cron": "0 0 31 2 *"}, "body.cron", "never"),
        ({"cron": "@reboot"}, "body.cron", "alias"),
        ({"webhook": "ftp://example.org/x"}, "body.webhook", "URL"),
        ({"webhook": "not a url"}, "body.webhook", "URL"),
        ({"baseline": "earliest"}, "body.baseline", "latest"),
        ({"notify": "sometimes"}, "body.notify", "regressions"),
        ({"when": "nightly"}, "body.when", "unknown key"),
        ({"name": ""}, "body.name", "at least 1"),
    ],
)
def test_bad_schedules_are_problems_naming_the_field(frozen_api, spec, changes, field, words):
    problem = assert_problem(frozen_api.post("/schedules", json=body(spec, **changes)), 422)
    assert [e["field"] for e in problem["errors"]] == [field]
    assert words in problem["detail"]
    assert frozen_api.get("/schedules").json()["numberMatched"] == 0


@pytest.mark.parametrize(
    ("webhook", "words"),
    [
        ("http://127.0.0.1:9/hook", "loopback"),
        ("http://127.1.2.3/hook", "loopback"),
        ("http://[::1]:8000/hook", "loopback"),
        ("http://localhost:8000/hook", "loopback"),  # the stub resolver: 127.0.0.1 and ::1
        ("http://169.254.169.254/latest/meta-data/", "link-local"),
        ("http://10.1.2.3/hook", "private"),
        ("http://[::ffff:127.0.0.1]/hook", "loopback"),
        ("https://nowhere.invalid/hook", "does not resolve"),
    ],
)
def test_webhooks_to_non_public_addresses_are_refused_at_creation(frozen_api, spec, webhook, words):
    """Blind SSRF: without an allow-list, no schedule may call the server's own network."""
    response = frozen_api.post("/schedules", json=body(spec, webhook=webhook))
    problem = assert_problem(response, 422, OWN + "webhook-refused")
    assert [e["field"] for e in problem["errors"]] == ["body.webhook"]
    assert words in problem["detail"]
    assert frozen_api.get("/schedules").json()["numberMatched"] == 0


@pytest.mark.parametrize("zone", ["Mars/Olympus", "", "../etc/passwd", "localtime", 7])
def test_an_unknown_time_zone_is_a_problem_naming_the_field(frozen_api, spec, zone):
    """Refused like a bad cron (the body's content: 422), the detail without the value sent."""
    problem = assert_problem(frozen_api.post("/schedules", json=body(spec, timezone=zone)), 422)
    assert [e["field"] for e in problem["errors"]] == ["body.timezone"]
    assert "timezone" in problem["detail"]
    if isinstance(zone, str) and zone:
        assert zone not in problem["detail"]
    assert frozen_api.get("/schedules").json()["numberMatched"] == 0


def test_a_schedule_in_a_time_zone_runs_on_its_local_clock(frozen_api, spec, clock, runner):
    """02:00 in Europe/Oslo on 2 November 2026 (CET, UTC+1) is 01:00 UTC: the next run is
    reported, and the slot run, at that UTC time; the zone is echoed wherever the schedule is."""
    # reference: the IANA tz database via zoneinfo
    slot = dt.datetime(2026, 11, 2, 2, 0, tzinfo=ZoneInfo("Europe/Oslo")).astimezone(dt.UTC)
    stamp = slot.strftime("%Y-%m-%dT%H:%M:%SZ")
    assert stamp == "2026-11-02T01:00:00Z"
    created = frozen_api.post("/schedules", json=body(spec, timezone=" Europe/Oslo "))
    assert created.status_code == 201, created.text
    schedule = created.json()
    assert schedule["timezone"] == "Europe/Oslo" and schedule["nextRun"] == stamp
    shown = frozen_api.get(f"/schedules/{schedule['id']}").json()
    assert shown["timezone"] == "Europe/Oslo" and shown["nextRun"] == stamp
    assert frozen_api.get("/schedules").json()["schedules"][0]["timezone"] == "Europe/Oslo"

    clock.now = slot - dt.timedelta(seconds=1)
    assert frozen_api.app.state.scheduler.tick() == []
    clock.now = slot + dt.timedelta(seconds=5)
    assert len(frozen_api.app.state.scheduler.tick()) == 1
    runs = frozen_api.get(f"/schedules/{schedule['id']}").json()["runs"]
    assert [(r["slot"], r["outcome"]) for r in runs] == [(stamp, "submitted")]
    runner.gate.set()
    wait_for_status(frozen_api, runs[0]["jobID"], "successful")


def test_a_schedule_needs_a_name_a_cron_and_a_spec(frozen_api, spec):
    problem = assert_problem(frozen_api.post("/schedules", json={"inputs": spec}), 422)
    assert {e["field"] for e in problem["errors"]} == {"body.name", "body.cron"}
    problem = assert_problem(frozen_api.post("/schedules", json=body({"name": "x"})), 422)
    assert any(e["field"].startswith("body.inputs") for e in problem["errors"])


def test_a_spec_that_cannot_run_is_refused_at_once(frozen_api, spec, data_root):
    (data_root.parent / "outside").mkdir()
    (data_root.parent / "outside" / "x.tif").write_bytes(b"")
    spec["test"]["tiles"] = "../outside/*.tif"
    problem = assert_problem(frozen_api.post("/schedules", json=body(spec)), 403)
    assert problem["detail"].startswith("test.tiles")
    spec["test"]["tiles"] = "nothing/*.tif"
    assert_problem(frozen_api.post("/schedules", json=body(spec)), 422, OWN + "invalid-spec")


def test_malformed_json_is_400(frozen_api):
    response = frozen_api.post(
        "/schedules", content=b'{"name": ', headers={"Content-Type": "application/json"}
    )
    assert_problem(response, 400)


# --- scheduled runs are jobs ---------------------------------------------------------------------


def wait_for_status(api: TestClient, job_id: str, status: str) -> dict[str, Any]:
    deadline = time.monotonic() + 5
    while (doc := api.get(f"/jobs/{job_id}").json())["status"] != status:
        assert time.monotonic() < deadline, doc
        time.sleep(0.01)
    return doc


def test_a_scheduled_run_is_a_job_and_an_overlapping_slot_is_skipped(
    frozen_api, spec, clock, runner
):
    schedule_id = frozen_api.post("/schedules", json=body(spec)).json()["id"]
    tick = frozen_api.app.state.scheduler.tick
    clock.now = dt.datetime(2026, 11, 2, 2, 0, 5, tzinfo=dt.UTC)
    assert len(tick()) == 1
    jobs = frozen_api.get("/jobs").json()["jobs"]
    assert len(jobs) == 1 and jobs[0]["scheduleID"] == schedule_id
    job_id = jobs[0]["jobID"]
    status = wait_for_status(frozen_api, job_id, "running")  # the runner waits for its gate
    schedule_url = f"http://testserver/schedules/{schedule_id}"
    assert {"rel": "related", "href": schedule_url} in [
        {"rel": link["rel"], "href": link["href"]} for link in status["links"]
    ]
    shown = frozen_api.get(f"/schedules/{schedule_id}").json()
    assert shown["lastRun"]["jobID"] == job_id and shown["lastRun"]["jobStatus"] == "running"
    assert shown["lastRun"]["outcome"] == "submitted" and shown["lastRun"]["reason"] == "full run"
    assert shown["lastRun"]["links"][0]["href"] == f"http://testserver/jobs/{job_id}"
    assert shown["nextRun"] == "2026-11-03T02:00:00Z"

    clock.now = dt.datetime(2026, 11, 3, 2, 0, 5, tzinfo=dt.UTC)  # the first run goes on
    assert len(tick()) == 1
    runs = frozen_api.get(f"/schedules/{schedule_id}").json()["runs"]
    assert [(r["slot"], r["outcome"]) for r in runs] == [
        ("2026-11-03T02:00:00Z", "skipped"),
        ("2026-11-02T02:00:00Z", "submitted"),
    ]
    assert job_id in runs[0]["reason"] and runs[0]["jobID"] is None
    assert frozen_api.get("/jobs").json()["numberMatched"] == 1

    runner.gate.set()
    wait_for_status(frozen_api, job_id, "successful")
    clock.now = dt.datetime(2026, 11, 4, 2, 1, tzinfo=dt.UTC)
    assert len(tick()) == 1
    assert frozen_api.get("/jobs").json()["numberMatched"] == 2

    # deleting the schedule stops it and keeps its jobs
    assert frozen_api.delete(f"/schedules/{schedule_id}").status_code == 204
    clock.now = dt.datetime(2026, 11, 5, 2, 1, tzinfo=dt.UTC)
    assert tick() == []
    assert frozen_api.get("/jobs").json()["numberMatched"] == 2
    assert frozen_api.get(f"/jobs/{job_id}").json()["scheduleID"] == schedule_id


def test_the_api_description_lists_the_schedule_operations(frozen_api):
    paths = frozen_api.get("/openapi.json").json()["paths"]
    assert set(paths["/schedules"]) == {"get", "post"}
    assert set(paths["/schedules/{scheduleID}"]) == {"get", "delete"}


# --- the command line -----------------------------------------------------------------------------


@pytest.fixture
def cli_on_api(frozen_api, settings, monkeypatch) -> TestClient:
    """``demaudit`` talking to the frozen app (no server process, no network)."""
    monkeypatch.setattr(cli, "Settings", lambda: settings)
    monkeypatch.setattr(
        remote, "http_client", lambda args, settings: contextlib.nullcontext(frozen_api)
    )
    return frozen_api


def test_schedule_add_sends_the_time_zone_and_list_shows_it(cli_on_api, spec, tmp_path, capsys):
    spec_file = tmp_path / "nightly.json"
    spec_file.write_text(json.dumps(spec))
    server = ["--server", "http://testserver"]
    add = ["schedule", "add", str(spec_file), "--cron", "0 2 * * *", *server]
    assert cli.main([*add, "--timezone", "Europe/Oslo"]) == 0
    out = capsys.readouterr().out
    assert out.endswith("next run 2026-11-02 01:00 UTC (2026-11-02 02:00 Europe/Oslo)\n")
    schedule_id = out.split()[1]
    assert cli_on_api.get(f"/schedules/{schedule_id}").json()["timezone"] == "Europe/Oslo"

    assert cli.main([*add, "--name", "in utc"]) == 0  # no --timezone: UTC
    out = capsys.readouterr().out
    assert out.endswith("next run 2026-11-02 02:00\n")
    utc_id = out.split()[1]

    assert cli.main(["schedule", "list", *server]) == 0
    header, *lines = capsys.readouterr().out.splitlines()
    rows = {line.split()[0]: line for line in lines}
    assert "time zone" in header and header.index("time zone") < header.index("next run (UTC)")
    assert "Europe/Oslo" in rows[schedule_id] and "2026-11-02 01:00" in rows[schedule_id]
    assert " UTC " in rows[utc_id] and "2026-11-02 02:00" in rows[utc_id]

    assert cli.main([*add, "--timezone", "Mars/Olympus"]) == 2
    assert "unknown time zone" in capsys.readouterr().err


def test_schedule_add_parses_the_time_zone_with_utc_by_default():
    argv = ["schedule", "add", "spec.yaml", "--cron", "0 2 * * *", "--server", "http://h"]
    assert cli.build_parser().parse_args(argv).timezone == "UTC"
    zoned = cli.build_parser().parse_args([*argv, "--timezone", "America/New_York"])
    assert zoned.timezone == "America/New_York" and zoned.spec == Path("spec.yaml")


def test_schedule_add_prints_the_webhook_secret_once(cli_on_api, spec, tmp_path, capsys):
    spec_file = tmp_path / "nightly.json"
    spec_file.write_text(json.dumps(spec))
    server = ["--server", "http://testserver"]
    add = ["schedule", "add", str(spec_file), "--cron", "0 2 * * *", *server]
    assert cli.main([*add, "--webhook", "https://hooks.example.org/x"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[1].startswith("webhook signing secret (shown only now): ")
    assert len(lines[1].split()[-1]) >= 43
    assert cli.main([*add, "--webhook", "http://127.0.0.1:8000/x"]) == 2
    assert "loopback" in capsys.readouterr().err
