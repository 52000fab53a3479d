"""Schedules: a job spec run on a cron schedule (nightly re-checks), with its runs and webhook.

The runs are ordinary jobs (``/jobs``) whose status documents name the schedule; the scheduler
that starts them is ``demaudit.service.scheduling.scheduler``. A schedule belongs to the principal
that created it,
and so do its runs; other principals (unless admins) get 404 for it. The webhook URL is shown
redacted to everyone; its signing secret only once, in the creation response.
"""

from __future__ import annotations

import datetime as dt
import ipaddress
import secrets
import uuid
from typing import Annotated, Any, Literal

from fastapi import APIRouter, Path, Query, Request, Response
from pydantic import BaseModel, ConfigDict, Field, HttpUrl, field_validator

from demaudit.service.api.auth import Principal
from demaudit.service.api.deps import PrincipalDep, SettingsDep, StoreDep
from demaudit.service.api.problems import NoSuchScheduleError, WebhookNotAllowedError, responses
from demaudit.service.api.routes.documents import JSON, Link
from demaudit.service.scheduling.cron import Clock, check_cron, check_timezone, due_runs, next_slot
from demaudit.service.scheduling.scheduler import resolve_inputs
from demaudit.service.scheduling.webhook_address import (
    IPNetwork,
    Resolver,
    WebhookAddressError,
    check_webhook_url,
    redact_url,
)
from demaudit.service.store.jobs import JobStatus, JobStore
from demaudit.service.store.schedules import (
    DEFAULT_TIMEZONE,
    NotifyWhen,
    RunOutcome,
    ScheduleRecord,
    ScheduleRun,
)
from demaudit.workers.spec import JobSpec

router = APIRouter(prefix="/schedules", tags=["Schedules"], responses=responses(401))

RUNS_SHOWN = 20
ScheduleId = Annotated[str, Path(alias="scheduleID", description="The schedule's id.")]


class ScheduleRequest(BaseModel):
    """A new schedule: a job spec, when to run it, and whom to tell."""

    model_config = ConfigDict(extra="forbid")

    name: str = Field(min_length=1, max_length=200, description="A name for people.")
    cron: str = Field(
        max_length=200,
        description="When to run, on the clock of timezone: five cron fields (minute hour day "
        "month weekday), e.g. '0 2 * * *' for 02:00 every night, or @daily, @hourly and kin.",
    )
    timezone: str = Field(
        default=DEFAULT_TIMEZONE,
        max_length=64,
        description="IANA time zone whose wall clock the cron follows, daylight-saving time "
        "included, e.g. 'Europe/Oslo' (default 'UTC'). A time the clocks skip runs when they "
        "jump; a fixed time that comes twice runs once.",
    )
    inputs: JobSpec = Field(description="The job spec, as in an execute request.")
    webhook: HttpUrl | None = Field(
        default=None,
        description="http(s) URL to POST the change report to (see notify); its host must "
        "resolve to public addresses (or networks the server allows). Each delivery is signed: "
        "X-Demaudit-Signature: sha256=<hex HMAC-SHA256 of timestamp + '.' + body, keyed with "
        "webhookSecret>, X-Demaudit-Timestamp: <POSIX seconds>.",
    )
    notify: NotifyWhen = Field(
        default="regressions",
        description="'regressions': call the webhook after a run that found regressions; "
        "'always': after every run.",
    )
    baseline: Literal["latest"] | None = Field(
        default=None,
        description="'latest': each run re-checks against this schedule's last successful run "
        "(only changed tiles are recomputed; a full run when there is none).",
    )

    @field_validator("cron")
    @classmethod
    def _cron(cls, value: str) -> str:
        return check_cron(value)

    @field_validator("timezone")
    @classmethod
    def _timezone(cls, value: str) -> str:
        try:
            return check_timezone(value)
        except ValueError:  # problem details never echo submitted values
            raise ValueError(
                "unknown time zone; use an IANA name such as Europe/Oslo or UTC"
            ) from None


class ScheduleRunInfo(BaseModel):
    """One handled slot of a schedule."""

    slot: dt.datetime
    outcome: RunOutcome
    reason: str
    claimedBy: str  # noqa: N815 - the API's member style
    jobID: str | None = None  # noqa: N815
    jobStatus: JobStatus | None = None  # noqa: N815
    links: list[Link] = []


class ScheduleInfo(BaseModel):
    """A schedule and what it did last."""

    id: str
    name: str
    cron: str
    timezone: str = Field(description="IANA time zone whose wall clock the cron follows.")
    notify: NotifyWhen
    baseline: Literal["latest"] | None
    webhook: str | None = Field(
        description="The webhook's scheme, host and port; the rest (path, query, user) is "
        "shown as '***'."
    )
    owner: str | None = Field(description="The principal the schedule and its runs belong to.")
    created: dt.datetime
    nextRun: dt.datetime | None = Field(  # noqa: N815
        description="The next slot, as a UTC time (the cron read in timezone)."
    )
    lastRun: ScheduleRunInfo | None  # noqa: N815
    links: list[Link]


class ScheduleDetail(ScheduleInfo):
    """A schedule with its spec and recent runs (newest first)."""

    inputs: dict[str, Any]
    runs: list[ScheduleRunInfo]


class ScheduleCreated(ScheduleDetail):
    """A new schedule, with the webhook's signing secret (shown this once)."""

    webhookSecret: str | None = Field(  # noqa: N815
        description="Key of the HMAC-SHA256 signature of each webhook delivery; keep it, it is "
        "never shown again (None without a webhook)."
    )


class ScheduleList(BaseModel):
    """A page of schedules, oldest first."""

    schedules: list[ScheduleInfo]
    numberMatched: int  # noqa: N815
    numberReturned: int  # noqa: N815
    links: list[Link]


def _clock(request: Request) -> Clock:
    clock: Clock = request.app.state.clock
    return clock


def _schedule(store: JobStore, schedule_id: str, principal: Principal) -> ScheduleRecord:
    """The schedule when principal may see it; the same 404 as for none otherwise."""
    schedule = store.get_schedule(schedule_id) if len(schedule_id) <= 64 else None
    if schedule is None or not principal.may_access(schedule.owner):
        raise NoSuchScheduleError(f"there is no schedule {schedule_id!r}")
    return schedule


def _run_info(request: Request, store: JobStore, run: ScheduleRun) -> ScheduleRunInfo:
    job = store.get(run.job_id) if run.job_id else None
    links = []
    if run.job_id:
        href = str(request.url_for("get_job", jobID=run.job_id))
        links.append(Link(href=href, rel="related", type=JSON, title="the job of this run"))
    return ScheduleRunInfo(
        slot=run.slot,
        outcome=run.outcome,
        reason=run.reason,
        claimedBy=run.owner,
        jobID=run.job_id,
        jobStatus=job.status if job is not None else None,
        links=links,
    )


def _next_run(schedule: ScheduleRecord, now: dt.datetime) -> dt.datetime | None:
    due = due_runs(schedule, schedule.last_slot, now)
    if due:
        return due[0]  # runs at the next tick
    after = max(now, schedule.last_slot or schedule.created, schedule.created)
    return next_slot(schedule.cron, after, timezone=schedule.timezone)


def _info(request: Request, store: JobStore, schedule: ScheduleRecord) -> dict[str, Any]:
    url = str(request.url_for("get_schedule", scheduleID=schedule.schedule_id))
    last = store.find_runs(schedule.schedule_id, limit=1)
    return {
        "id": schedule.schedule_id,
        "name": schedule.name,
        "cron": schedule.cron,
        "timezone": schedule.timezone,
        "notify": schedule.notify,
        "baseline": schedule.baseline,
        "webhook": redact_url(schedule.webhook),
        "owner": schedule.owner,
        "created": schedule.created,
        "nextRun": _next_run(schedule, _clock(request)()),
        "lastRun": _run_info(request, store, last[0]) if last else None,
        "links": [
            Link(href=url, rel="self", type=JSON, title="this schedule"),
            Link(
                href=str(request.url_for("list_schedules")),
                rel="up",
                type=JSON,
                title="all schedules",
            ),
        ],
    }


def _detail(request: Request, store: JobStore, schedule: ScheduleRecord) -> ScheduleDetail:
    runs = store.find_runs(schedule.schedule_id, limit=RUNS_SHOWN)
    return ScheduleDetail(
        **_info(request, store, schedule),
        inputs=schedule.inputs,
        runs=[_run_info(request, store, run) for run in runs],
    )


@router.post(
    "",
    name="create_schedule",
    status_code=201,
    response_model=ScheduleCreated,
    responses=responses(400, 403, 413, 422),
)
def create_schedule(
    body: ScheduleRequest,
    request: Request,
    response: Response,
    settings: SettingsDep,
    store: StoreDep,
    principal: PrincipalDep,
) -> ScheduleCreated:
    """Run a job spec on a cron schedule; the Location header names the new schedule. The
    answer carries the webhook's signing secret, this once."""
    inputs = body.inputs.model_dump(mode="json")
    resolve_inputs(inputs, data_roots=settings.data_roots)  # refuse what could never run
    webhook = str(body.webhook) if body.webhook is not None else None
    if webhook is not None:
        _check_webhook(request, webhook, settings.webhook_allow_networks)
    now = _clock(request)()
    schedule = ScheduleRecord(
        schedule_id=uuid.uuid4().hex,
        name=body.name,
        cron=body.cron,
        timezone=body.timezone,
        inputs=inputs,
        created=now.replace(microsecond=now.microsecond // 1000 * 1000),
        webhook=webhook,
        notify=body.notify,
        baseline=body.baseline,
        base_url=str(request.base_url).rstrip("/"),
        owner=principal.name,
        webhook_secret=secrets.token_urlsafe(32) if webhook is not None else None,
    )
    store.add_schedule(schedule)
    response.headers["Location"] = str(
        request.url_for("get_schedule", scheduleID=schedule.schedule_id)
    )
    detail = _detail(request, store, schedule)
    return ScheduleCreated(**detail.model_dump(), webhookSecret=schedule.webhook_secret)


def webhook_resolver(request: Request) -> Resolver:
    """The name resolver webhook checks use (``create_app``'s, replaced in tests)."""
    resolver: Resolver = request.app.state.webhook_resolver
    return resolver


def allowed_networks(texts: tuple[str, ...]) -> list[IPNetwork]:
    """The allow-list setting as networks (validated by the settings)."""
    return [ipaddress.ip_network(text, strict=False) for text in texts]


def _check_webhook(request: Request, url: str, allow: tuple[str, ...]) -> None:
    try:
        check_webhook_url(url, allow=allowed_networks(allow), resolve=webhook_resolver(request))
    except WebhookAddressError as exc:
        field = "body.webhook"
        raise WebhookNotAllowedError(
            f"{field}: {exc}", errors=[{"field": field, "message": str(exc), "type": "webhook"}]
        ) from None


@router.get("", name="list_schedules", response_model=ScheduleList, responses=responses(400))
def list_schedules(
    request: Request,
    store: StoreDep,
    principal: PrincipalDep,
    limit: Annotated[int, Query(ge=1, le=1000)] = 100,
    offset: Annotated[int, Query(ge=0, le=10**9)] = 0,
) -> ScheduleList:
    """The caller's schedules (an admin's: all), oldest first; page with limit and offset."""
    owner = principal.owner_filter
    matched = store.count_schedules(owner=owner)
    chosen = store.find_schedules(limit=limit, offset=offset, owner=owner)
    links = [Link(href=str(request.url), rel="self", type=JSON)]
    if offset + len(chosen) < matched:
        href = str(request.url.include_query_params(offset=offset + limit, limit=limit))
        links.append(Link(href=href, rel="next", type=JSON))
    return ScheduleList(
        schedules=[ScheduleInfo(**_info(request, store, s)) for s in chosen],
        numberMatched=matched,
        numberReturned=len(chosen),
        links=links,
    )


@router.get(
    "/{scheduleID}", name="get_schedule", response_model=ScheduleDetail, responses=responses(404)
)
def get_schedule(
    schedule_id: ScheduleId, request: Request, store: StoreDep, principal: PrincipalDep
) -> ScheduleDetail:
    """A schedule: its spec, next run and recent runs with their jobs."""
    return _detail(request, store, _schedule(store, schedule_id, principal))


@router.delete("/{scheduleID}", name="delete_schedule", status_code=204, responses=responses(404))
def delete_schedule(schedule_id: ScheduleId, store: StoreDep, principal: PrincipalDep) -> Response:
    """Delete a schedule: no further runs; its jobs (and a run still going) stay."""
    _schedule(store, schedule_id, principal)
    if not store.remove_schedule(schedule_id):
        raise NoSuchScheduleError(f"there is no schedule {schedule_id!r}")
    return Response(status_code=204)
