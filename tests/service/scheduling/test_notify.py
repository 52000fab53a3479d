"""Webhook notifications against a real HTTP receiver on 127.0.0.1 (reached through the
allow-list, as loopback is refused otherwise): retries with back-off, bounded tries, signatures,
and the outcome in the job's record when a scheduled run ends. The address check runs with name
resolution stubbed: no test sends anything outside 127.0.0.0/8."""

from __future__ import annotations

import datetime as dt
import hashlib
import hmac
import ipaddress
import json
import socket
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from fastapi.testclient import TestClient

from demaudit.service.api.app import create_app
from demaudit.service.scheduling.notify import deliver as deliver_anywhere
from demaudit.service.settings import Settings
from demaudit.service.store.jobs import MemoryJobStore
from tests.service.tokens import AUTH
from tests.support.webhooks import Receiver, stub

T0 = dt.datetime(2026, 11, 1, 12, 0, tzinfo=dt.UTC)
LOOPBACK = (ipaddress.ip_network("127.0.0.0/8"),)


def deliver(url: str, payload: Any, **options: Any):
    """deliver() with the loopback network allowed (the receivers of these tests)."""
    return deliver_anywhere(url, payload, allow=LOOPBACK, **options)


@pytest.fixture
def receiver() -> Iterator[Callable[..., Receiver]]:
    """receiver(statuses, default=200, headers=None) -> a running Receiver (closed after the
    test); headers are added to every answer."""
    started: list[Receiver] = []

    def start(
        statuses: list[int], default: int = 200, headers: dict[str, str] | None = None
    ) -> Receiver:
        started.append(Receiver(statuses, default, headers))
        return started[-1]

    yield start
    for r in started:
        r.close()


# --- deliver ---------------------------------------------------------------------------------


def test_deliver_retries_with_doubling_waits_until_accepted(receiver):
    hook = receiver([500, 500])
    report = {"jobID": "j1", "regressions": 2, "recheck": {"regressions": 2, "tiles": []}}
    delivery = deliver(hook.url, report, attempts=5, backoff_s=0.1)
    assert delivery.delivered and delivery.attempts == 3 and delivery.status_code == 200
    assert [body for _, _, body in hook.requests] == [report] * 3
    times = [t for t, _, _ in hook.requests]
    waits = [later - earlier for earlier, later in zip(times, times[1:], strict=False)]
    assert waits[0] >= 0.1 and waits[1] >= 0.2  # 0.1 s, then doubled
    assert waits[1] > 1.5 * waits[0]


def test_deliver_gives_up_after_the_bounded_tries(receiver):
    hook = receiver([], default=500)
    started = time.monotonic()
    delivery = deliver(hook.url, {"jobID": "j1"}, attempts=5, backoff_s=0.01)
    assert not delivery.delivered
    assert delivery.attempts == 5 and len(hook.requests) == 5
    assert delivery.status_code == 500 and delivery.error == "HTTP 500"
    assert time.monotonic() - started < 5  # waits of 0.01 + 0.02 + 0.04 + 0.08 s


def test_a_client_error_is_final(receiver):
    hook = receiver([404])
    delivery = deliver(hook.url, {"jobID": "j1"}, attempts=5, backoff_s=0.01)
    assert not delivery.delivered and delivery.attempts == 1 and len(hook.requests) == 1
    assert "not retried" in (delivery.error or "")


@pytest.mark.parametrize("status", [429, 503])
def test_busy_answers_are_retried(receiver, status):
    hook = receiver([status])
    assert deliver(hook.url, {}, attempts=3, backoff_s=0.01).attempts == 2


def test_an_unreachable_receiver_is_tried_the_bounded_number_of_times():
    with socket.socket() as s:  # a port nobody listens on
        s.bind(("127.0.0.1", 0))
        url = f"http://127.0.0.1:{s.getsockname()[1]}/hook"
    delivery = deliver(url, {}, attempts=3, backoff_s=0.01, timeout_s=2)
    assert not delivery.delivered and delivery.attempts == 3
    assert delivery.status_code is None and "ConnectError" in (delivery.error or "")


def test_a_stop_ends_the_waiting_at_once(receiver):
    hook = receiver([], default=500)
    stop = threading.Event()
    stop.set()
    delivery = deliver(hook.url, {}, attempts=5, backoff_s=60, wait=stop.wait)
    assert not delivery.delivered and delivery.attempts == 1
    assert "shut down" in (delivery.error or "")


# --- through the app: a scheduled run ends, its webhook is called ----------------------------


class FrozenClock:
    def __init__(self, now: dt.datetime) -> None:
        self.now = now

    def __call__(self) -> dt.datetime:
        return self.now


class RecheckRunner:
    """Stands in for run_job: writes a minimal results folder; with a baseline it reports a
    change report with ``regressions`` regressions."""

    def __init__(self, regressions: int) -> None:
        self.regressions = regressions
        self.baselines: list[Path | None] = []

    def __call__(self, job: Any, out_dir: Path, *, baseline: Path | None = None, **_: Any):
        self.baselines.append(baseline)
        (out_dir / "results.zarr").mkdir(parents=True)
        summary: dict[str, Any] = {"job": {"tiles": {"test": 2, "failed": 0}}}
        if baseline is not None:
            summary["recheck"] = {
                "baseline": str(baseline),
                "regressions": self.regressions,
                "tiles": [{"tile": "t1", "verdict": "regressed", "why": "content changed"}],
            }
        (out_dir / "summary.json").write_text(json.dumps(summary))
        return summary


@pytest.fixture
def scheduled_app(
    settings: Settings, cluster_factory, resolver
) -> Iterator[Callable[..., TestClient]]:
    """scheduled_app(runner) -> a TestClient whose scheduler runs on a frozen clock
    (``client.clock``) and ticks only when the test calls ``client.tick()``; webhooks may
    reach 127.0.0.1/32 (the allow-list), names resolve through the stub resolver."""
    opened: list[TestClient] = []

    def open_app(runner: RecheckRunner, *, resolve: Any = resolver) -> TestClient:
        quick = settings.model_copy(
            update={
                "schedule_tick_s": 3600.0,
                "schedule_lease_s": 7200.0,
                "webhook_backoff_s": 0.02,
                "webhook_allow_networks": ("127.0.0.1/32",),
            }
        )
        clock = FrozenClock(T0)
        app = create_app(
            quick,
            store=MemoryJobStore(),
            runner=runner,
            client_factory=cluster_factory,
            clock=clock,
            webhook_resolver=resolve,
        )
        client = TestClient(app, headers=AUTH)
        client.__enter__()
        client.clock = clock  # type: ignore[attr-defined]
        client.tick = app.state.scheduler.tick  # type: ignore[attr-defined]
        opened.append(client)
        return client

    yield open_app
    for client in opened:
        client.__exit__(None, None, None)


def run_nights(api: TestClient, spec: dict[str, Any], webhook: str, nights: int, **extra: Any):
    """Create a nightly schedule re-checking against its last run; run it for nights nights
    (each to its end); return the schedule id and the jobs' final status documents."""
    body = {"name": "nightly", "cron": "0 2 * * *", "inputs": spec, "webhook": webhook}
    response = api.post("/schedules", json=body | {"baseline": "latest"} | extra)
    assert response.status_code == 201, response.text
    api.last_secret = response.json()["webhookSecret"]  # type: ignore[attr-defined]
    statuses = []
    for night in range(nights):
        api.clock.now = T0.replace(hour=2) + dt.timedelta(days=night + 1)  # type: ignore[attr-defined]
        [(_, run)] = api.tick()  # type: ignore[attr-defined]
        job_id = api.get(f"/schedules/{response.json()['id']}").json()["lastRun"]["jobID"]
        statuses.append(wait_for_end(api, job_id))
    return response.json()["id"], statuses


def wait_for_end(api: TestClient, job_id: str, timeout: float = 10.0) -> dict[str, Any]:
    """The job's status document once it ended and any webhook call is settled."""
    deadline = time.monotonic() + timeout
    while True:
        doc: dict[str, Any] = api.get(f"/jobs/{job_id}").json()
        settled = doc.get("notification", {}).get("status") != "pending"
        if doc["status"] in {"successful", "failed", "dismissed"} and settled:
            return doc
        assert time.monotonic() < deadline, doc
        time.sleep(0.01)


def test_a_run_with_regressions_posts_its_change_report_after_retries(
    scheduled_app, receiver, spec
):
    hook = receiver([500, 500])
    api = scheduled_app(RecheckRunner(regressions=2))
    schedule_id, (first, second) = run_nights(api, spec, hook.url, nights=2)
    assert "notification" not in first  # a full run has no change report to tell
    assert second["status"] == "successful"
    assert second["notification"]["status"] == "delivered"
    assert second["notification"]["attempts"] == 3
    # the report arrived once accepted, as sent three times
    assert len(hook.requests) == 3
    _, headers, payload = hook.requests[-1]
    assert headers["Idempotency-Key"] == second["jobID"]
    assert payload["jobID"] == second["jobID"] and payload["status"] == "successful"
    assert payload["regressions"] == 2 and payload["recheck"]["regressions"] == 2
    assert payload["recheck"]["tiles"][0]["verdict"] == "regressed"
    assert payload["schedule"]["id"] == schedule_id
    links = {link["rel"]: link["href"] for link in payload["links"]}
    assert links["status"] == f"http://testserver/jobs/{second['jobID']}"
    assert links["http://www.opengis.net/def/rel/ogc/1.0/results"].endswith("/results")
    # the job's status document names its schedule
    assert second["scheduleID"] == schedule_id
    assert f"http://testserver/schedules/{schedule_id}" in [x["href"] for x in second["links"]]


def test_a_receiver_that_never_accepts_is_recorded_and_harms_nothing(scheduled_app, receiver, spec):
    hook = receiver([], default=503)
    api = scheduled_app(RecheckRunner(regressions=1))
    _, (_, second) = run_nights(api, spec, hook.url, nights=2)
    assert second["status"] == "successful"
    note = second["notification"]
    assert note["status"] == "failed" and note["attempts"] == 5
    assert note["httpStatus"] == 503 and note["error"] == "HTTP 503"
    assert len(hook.requests) == 5
    assert api.get("/health").status_code == 200
    assert api.get(f"/jobs/{second['jobID']}/results").status_code == 200


def test_no_regressions_no_call_unless_always(scheduled_app, receiver, spec):
    quiet, chatty = receiver([]), receiver([])
    api = scheduled_app(RecheckRunner(regressions=0))
    _, statuses = run_nights(api, spec, quiet.url, nights=2)
    assert quiet.requests == [] and all("notification" not in s for s in statuses)
    api = scheduled_app(RecheckRunner(regressions=0))
    _, statuses = run_nights(api, spec, chatty.url, nights=2, notify="always")
    assert [s["notification"]["status"] for s in statuses] == ["delivered", "delivered"]
    assert [body["recheck"] is None for _, _, body in chatty.requests] == [True, False]


# --- signatures ------------------------------------------------------------------------------


def test_each_delivery_is_signed_over_the_exact_body(scheduled_app, receiver, spec):
    hook = receiver([500])
    api = scheduled_app(RecheckRunner(regressions=1))
    _, (_, second) = run_nights(api, spec, hook.url, nights=2)
    assert second["notification"]["status"] == "delivered"
    secret = api.last_secret  # type: ignore[attr-defined]
    assert len(hook.raw_bodies) == 2  # one retry: each try signed on its own
    for (_, headers, _), raw in zip(hook.requests, hook.raw_bodies, strict=True):
        timestamp = headers["X-Demaudit-Timestamp"]
        assert abs(int(timestamp) - time.time()) < 3600
        # what a receiver does (the module docstring's recipe), with hmac from the stdlib
        expected = hmac.new(secret.encode(), timestamp.encode() + b"." + raw, hashlib.sha256)
        assert headers["X-Demaudit-Signature"] == "sha256=" + expected.hexdigest()
        assert headers["Content-Type"] == "application/json"
    wrong = hmac.new(b"another secret", hook.raw_bodies[0], hashlib.sha256).hexdigest()
    assert hook.requests[0][1]["X-Demaudit-Signature"] != "sha256=" + wrong


def test_an_unsigned_delivery_without_a_secret(receiver):
    hook = receiver([])
    assert deliver(hook.url, {"jobID": "j"}, attempts=1).delivered
    assert "X-Demaudit-Signature" not in hook.requests[0][1]


def test_redirects_are_not_followed(receiver):
    target = receiver([])
    hook = receiver([307], headers={"Location": target.url})
    delivery = deliver(hook.url, {"jobID": "j"}, attempts=3, backoff_s=0.01)
    assert not delivery.delivered and delivery.attempts == 1 and delivery.status_code == 307
    assert len(hook.requests) == 1 and target.requests == []


# --- where a webhook may go: checked again before each try ---------------------------------


def test_delivery_checks_again_and_refuses_a_loopback_answer():
    """DNS may change between creation and delivery: the check before the try refuses."""
    sent: list[httpx.Request] = []
    transport = httpx.MockTransport(lambda r: sent.append(r) or httpx.Response(200))
    delivery = deliver_anywhere(
        "http://hooks.example.org/x", {}, resolve=stub("127.0.0.1"), transport=transport
    )
    assert not delivery.delivered and delivery.attempts == 1
    assert "refused" in (delivery.error or "") and "loopback" in (delivery.error or "")
    assert sent == []


def test_a_scheduled_delivery_whose_host_moved_to_loopback_is_refused(scheduled_app, spec):
    answers = [["93.184.216.34"]]  # public at creation, loopback when the run ends
    api = scheduled_app(RecheckRunner(regressions=1), resolve=lambda host, port: answers[-1])
    body = {"name": "n", "cron": "0 2 * * *", "inputs": spec, "notify": "always"}
    response = api.post("/schedules", json=body | {"webhook": "http://hooks.example.org/x"})
    assert response.status_code == 201, response.text
    answers.append(["169.254.169.254"])
    api.clock.now = T0.replace(hour=2) + dt.timedelta(days=1)  # type: ignore[attr-defined]
    api.tick()  # type: ignore[attr-defined]
    job_id = api.get(f"/schedules/{response.json()['id']}").json()["lastRun"]["jobID"]
    note = wait_for_end(api, job_id)["notification"]
    assert note["status"] == "failed" and "link-local" in note["error"]
    assert note["attempts"] == 1  # refused before any connection, not retried


def test_a_try_connects_to_the_address_it_checked(receiver, monkeypatch):
    """The name is resolved once, by the check; the connection goes to that address with the
    name in the Host header (so a second, different DNS answer is never used)."""
    hook = receiver([])
    port = hook.url.split(":")[2].split("/")[0]
    real = socket.getaddrinfo

    def only_addresses(host, *args, **kwargs):  # a lookup of the name would fail the test
        ipaddress.ip_address(host)
        return real(host, *args, **kwargs)

    monkeypatch.setattr(socket, "getaddrinfo", only_addresses)
    delivery = deliver(
        f"http://receiver.invalid:{port}/hook", {"jobID": "j"}, resolve=stub("127.0.0.1")
    )
    assert delivery.delivered, delivery
    assert hook.requests[0][1]["Host"] == f"receiver.invalid:{port}"
