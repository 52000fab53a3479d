"""Webhook notifications of scheduled runs: the change report POSTed with bounded retries.

::

    JobDispatcher ── on_end(record, summary) ──► Notifier.after_job
        not from a schedule, no webhook, nothing to tell ──► nothing
        else, on a delivery thread:
            deliver(url, payload)  try 1, wait b, try 2, wait 2b, try 3, ... (attempts tries)
            └─► the job's record: notification {status: delivered | failed, attempts, ...}

A schedule notifies after a successful run that found regressions (``notify: regressions``, the
default) or after every run (``notify: always``). The payload is the run's change report
(``summary.json`` → ``recheck``) with the job's id, status and links. Connection errors, time-outs
and HTTP 408, 425, 429 and 5xx are retried; other answers are final. A notification never fails a
job or the server: the outcome is written into the job's record (``notification``).

Where a webhook may go: ``demaudit.service.scheduling.webhook_address``.

Each delivery is signed (``signature_headers``) when the schedule has a secret (made at its
creation and shown once)::

    X-Demaudit-Timestamp: <POSIX seconds of this try>
    X-Demaudit-Signature: sha256=<hex HMAC-SHA256, key = the secret's UTF-8 bytes,
                                  message = timestamp + "." + the exact request body bytes>

A receiver recomputes the HMAC over the raw body it received, compares in constant time and
refuses timestamps older than a few minutes (replays).
"""

from __future__ import annotations

import contextlib
import datetime as dt
import hashlib
import hmac
import json
import logging
import threading
import time
from collections.abc import Callable, Mapping, Sequence
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from typing import Any

import httpx

from demaudit.service.scheduling.webhook_address import (
    IPNetwork,
    Resolver,
    WebhookRefusedError,
    WebhookUnresolvedError,
    check_webhook_url,
    pinned,
    system_resolver,
)
from demaudit.service.store.jobs import SUCCESSFUL, JobRecord, JobStore
from demaudit.service.store.schedules import ScheduleRecord

__all__ = ["Delivery", "Notifier", "change_report", "deliver", "should_notify", "sign"]

RETRIED_STATUSES = frozenset({408, 425, 429})
USER_AGENT = "demaudit/0.1.0 (webhook)"
EVENT = "demaudit.scheduled-run"

SIGNATURE_HEADER = "X-Demaudit-Signature"
TIMESTAMP_HEADER = "X-Demaudit-Timestamp"

log = logging.getLogger("demaudit.notify")


def sign(secret: str, timestamp: str, body: bytes) -> str:
    """The signature header's value: ``sha256=`` and the hex HMAC-SHA256 of
    ``timestamp + "." + body`` keyed with the secret."""
    message = timestamp.encode("ascii") + b"." + body
    digest = hmac.new(secret.encode("utf-8"), message, hashlib.sha256).hexdigest()
    return f"sha256={digest}"


def signature_headers(
    secret: str | None, body: bytes, *, now: float | None = None
) -> dict[str, str]:
    """The timestamp and signature headers of one try (none without a secret)."""
    if secret is None:
        return {}
    timestamp = str(int(time.time() if now is None else now))
    return {TIMESTAMP_HEADER: timestamp, SIGNATURE_HEADER: sign(secret, timestamp, body)}


@dataclass(frozen=True)
class Delivery:
    """How a webhook call went."""

    delivered: bool
    attempts: int
    status_code: int | None = None
    """HTTP status of the last answer (None when none came)."""
    error: str | None = None
    """Why the last try failed."""

    def as_record(self) -> dict[str, Any]:
        """The job record's ``notification`` entry."""
        entry: dict[str, Any] = {
            "status": "delivered" if self.delivered else "failed",
            "attempts": self.attempts,
            "at": dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
        }
        if self.status_code is not None:
            entry["httpStatus"] = self.status_code
        if self.error:
            entry["error"] = self.error
        return entry


def deliver(
    url: str,
    payload: Mapping[str, Any],
    *,
    attempts: int = 5,
    backoff_s: float = 0.5,
    timeout_s: float = 10.0,
    headers: Mapping[str, str] | None = None,
    secret: str | None = None,
    allow: Sequence[IPNetwork] = (),
    resolve: Resolver = system_resolver,
    transport: httpx.BaseTransport | None = None,
    wait: Callable[[float], bool] | None = None,
) -> Delivery:
    """POST payload as JSON to url, up to attempts tries, waiting backoff_s before the second
    and doubling the wait before each further one.

    Before each try the URL's addresses are checked (``check_webhook_url`` with allow and
    resolve): a refused address ends the delivery, a host that does not resolve is retried.
    With a secret each try is signed (``signature_headers``). Redirects are not followed.
    wait(seconds) does the waiting and returns True to give up early (a stop event's ``wait``);
    transport replaces the network (tests).
    """
    pause = wait if wait is not None else threading.Event().wait
    body = json.dumps(dict(payload), separators=(",", ":"), sort_keys=True).encode("utf-8")
    delay = backoff_s
    last = Delivery(False, 0)
    with httpx.Client(
        timeout=timeout_s,
        transport=transport,
        headers={"User-Agent": USER_AGENT, **dict(headers or {})},
        follow_redirects=False,
        trust_env=False,
    ) as http:
        for attempt in range(1, attempts + 1):
            if attempt > 1:
                if pause(delay):
                    error = f"{last.error}; then shut down"
                    return Delivery(False, attempt - 1, last.status_code, error)
                delay *= 2
            last, final = _try(
                http, url, body, attempt=attempt, secret=secret, allow=allow, resolve=resolve
            )
            if final:
                return last
    return Delivery(False, attempts, last.status_code, last.error)


def _try(
    http: httpx.Client,
    url: str,
    body: bytes,
    *,
    attempt: int,
    secret: str | None,
    allow: Sequence[IPNetwork],
    resolve: Resolver,
) -> tuple[Delivery, bool]:
    """One try: check the URL's addresses, POST to the first; how it went and whether that is
    final (delivered, refused, or an answer that is not retried)."""
    try:
        addresses = check_webhook_url(url, allow=allow, resolve=resolve)
    except WebhookRefusedError as exc:
        return Delivery(False, attempt, None, f"refused: {exc}"), True
    except WebhookUnresolvedError as exc:
        return Delivery(False, attempt, None, str(exc)), False
    target, pinned_headers, extensions = pinned(url, addresses[0])
    sent_headers = {"Content-Type": "application/json", **pinned_headers}
    sent_headers |= signature_headers(secret, body)
    try:
        response = http.post(target, content=body, headers=sent_headers, extensions=extensions)
    except httpx.HTTPError as exc:
        return Delivery(False, attempt, None, _describe(exc)), False
    status = response.status_code
    if response.is_success:
        return Delivery(True, attempt, status), True
    if status < 500 and status not in RETRIED_STATUSES:
        return Delivery(False, attempt, status, f"HTTP {status} (not retried)"), True
    return Delivery(False, attempt, status, f"HTTP {status}"), False


def should_notify(
    schedule: ScheduleRecord, record: JobRecord, summary: Mapping[str, Any] | None
) -> bool:
    """Whether the end of record (a run of schedule) is worth a webhook call."""
    if not schedule.webhook:
        return False
    if schedule.notify == "always":
        return True
    return record.status == SUCCESSFUL and _regressions(summary) > 0


def change_report(
    schedule: ScheduleRecord,
    record: JobRecord,
    summary: Mapping[str, Any] | None,
    *,
    base_url: str | None,
) -> dict[str, Any]:
    """The webhook payload: the change report of the run with the job and schedule it belongs
    to, and links (absolute when base_url is known)."""
    base = (base_url or "").rstrip("/")
    job_href = f"{base}/jobs/{record.job_id}"
    schedule_href = f"{base}/schedules/{schedule.schedule_id}"
    links = [
        {"href": job_href, "rel": "status", "type": "application/json", "title": "the job"},
        {"href": schedule_href, "rel": "related", "type": "application/json", "title": "schedule"},
    ]
    if record.status == SUCCESSFUL:
        links.append(
            {
                "href": f"{job_href}/results",
                "rel": "http://www.opengis.net/def/rel/ogc/1.0/results",
                "type": "application/json",
                "title": "results of the job",
            }
        )
    recheck = summary.get("recheck") if summary else None
    return {
        "event": EVENT,
        "schedule": {"id": schedule.schedule_id, "name": schedule.name, "cron": schedule.cron},
        "jobID": record.job_id,
        "status": record.status,
        "message": record.message,
        "finished": record.finished.isoformat() if record.finished else None,
        "regressions": _regressions(summary),
        "recheck": recheck,
        "links": links,
    }


def _describe(exc: Exception) -> str:
    text = str(exc)
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def _regressions(summary: Mapping[str, Any] | None) -> int:
    recheck = summary.get("recheck") if summary else None
    return int(recheck.get("regressions", 0)) if isinstance(recheck, Mapping) else 0


class Notifier:
    """Sends the webhook calls of finished scheduled runs on a few threads of its own."""

    def __init__(
        self,
        store: JobStore,
        *,
        attempts: int = 5,
        backoff_s: float = 0.5,
        timeout_s: float = 10.0,
        public_url: str | None = None,
        allow: Sequence[IPNetwork] = (),
        resolve: Resolver = system_resolver,
        max_workers: int = 2,
    ) -> None:
        self.store = store
        self._attempts = attempts
        self._backoff_s = backoff_s
        self._timeout_s = timeout_s
        self._public_url = public_url
        self._allow = tuple(allow)
        self._resolve = resolve
        self._pool = ThreadPoolExecutor(max_workers, thread_name_prefix="demaudit-webhook")
        self._stop = threading.Event()
        self._lock = threading.Lock()
        self._pending: dict[str, Future[None]] = {}

    def after_job(self, record: JobRecord, summary: Mapping[str, Any] | None) -> None:
        """The dispatcher's on_end hook: queue the webhook call the job's schedule asks for."""
        if record.schedule_id is None:
            return
        schedule = self.store.get_schedule(record.schedule_id)
        if schedule is None or schedule.webhook is None:
            return  # deleted since the run started, or no webhook
        if not should_notify(schedule, record, summary):
            return
        payload = change_report(
            schedule, record, summary, base_url=self._public_url or schedule.base_url
        )
        self.store.update(record.job_id, {"notification": {"status": "pending", "attempts": 0}})
        with self._lock:
            if self._stop.is_set():
                self._record(record.job_id, Delivery(False, 0, None, "server shut down first"))
                return
            future = self._pool.submit(
                self._send, record.job_id, schedule.webhook, payload, schedule.webhook_secret
            )
            self._pending[record.job_id] = future
        future.add_done_callback(lambda _: self._forget(record.job_id))

    def close(self, *, timeout: float = 10.0) -> None:
        """Stop retrying; record calls that never went out as failed; wait up to timeout."""
        with self._lock:
            self._stop.set()
            pending = dict(self._pending)
        self._pool.shutdown(wait=False, cancel_futures=True)
        for job_id, future in pending.items():
            if future.cancelled():
                self._record(job_id, Delivery(False, 0, None, "server shut down first"))
        for future in pending.values():
            if not future.cancelled():
                with contextlib.suppress(Exception):  # _send logs its own failures
                    future.result(timeout)

    def _send(self, job_id: str, url: str, payload: dict[str, Any], secret: str | None) -> None:
        try:
            delivery = deliver(
                url,
                payload,
                attempts=self._attempts,
                backoff_s=self._backoff_s,
                timeout_s=self._timeout_s,
                headers={"X-Demaudit-Event": EVENT, "Idempotency-Key": job_id},
                secret=secret,
                allow=self._allow,
                resolve=self._resolve,
                wait=self._stop.wait,
            )
        except Exception as exc:  # a malformed URL and the like: record, never raise
            log.exception("webhook call failed", extra={"job_id": job_id})
            delivery = Delivery(False, 0, None, f"{type(exc).__name__} (see the server log)")
        self._record(job_id, delivery)
        how = "delivered" if delivery.delivered else f"failed ({delivery.error})"
        log.info("webhook %s after %d tries", how, delivery.attempts, extra={"job_id": job_id})

    def _record(self, job_id: str, delivery: Delivery) -> None:
        try:
            self.store.update(job_id, {"notification": delivery.as_record()})
        except Exception:  # noqa: BLE001 - the store closed under us at shut-down
            log.warning("could not record the webhook outcome", extra={"job_id": job_id})

    def _forget(self, job_id: str) -> None:
        with self._lock:
            self._pending.pop(job_id, None)
