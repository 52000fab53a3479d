"""The OGC API - Processes documents the routes return (JSON), and how job records become them."""

from __future__ import annotations

import datetime as dt
from typing import Any, Literal

from fastapi import Request
from pydantic import BaseModel, ConfigDict, Field

from demaudit.service.api.problems import failure_cause
from demaudit.service.store.jobs import FAILED, SUCCESSFUL, JobRecord, JobStatus

REL_RESULTS = "http://www.opengis.net/def/rel/ogc/1.0/results"
REL_EXECUTE = "http://www.opengis.net/def/rel/ogc/1.0/execute"
REL_PROCESSES = "http://www.opengis.net/def/rel/ogc/1.0/processes"
REL_JOB_LIST = "http://www.opengis.net/def/rel/ogc/1.0/job-list"
REL_CONFORMANCE = "http://www.opengis.net/def/rel/ogc/1.0/conformance"
JSON = "application/json"


def _is_none(value: Any) -> bool:
    return value is None


OMITTED_WHEN_NONE: Any = Field(default=None, exclude_if=_is_none)
"""An optional member left out when None: the standard's schemas give each member a type
(a string, never null), so an absent member is how "not known" is said."""


class Link(BaseModel):
    """A web link."""

    href: str
    rel: str
    type: str | None = OMITTED_WHEN_NONE
    title: str | None = OMITTED_WHEN_NONE


class _Document(BaseModel):
    model_config = ConfigDict(extra="allow")


class TileCounts(BaseModel):
    """Test tiles finished and in all (known once the catalog is read)."""

    done: int
    total: int


class FailureCause(BaseModel):
    """Why a job failed, as the ``cause`` member of its results' 409 problem: the problem type
    of the cause, its title, and the HTTP status a problem of that cause alone would have."""

    type: str
    title: str
    status: int


class StatusInfo(_Document):
    """The status of one job (OGC statusInfo). A failed job's ``message`` says why it failed and
    ``cause`` (an extension member; statusInfo allows them) what kind of failure it was."""

    jobID: str  # noqa: N815 - the standard's member names
    type: Literal["process"] = "process"
    processID: str  # noqa: N815
    status: JobStatus
    message: str
    created: dt.datetime
    started: dt.datetime | None = OMITTED_WHEN_NONE
    finished: dt.datetime | None = OMITTED_WHEN_NONE
    updated: dt.datetime
    progress: int = Field(ge=0, le=100)
    tiles: TileCounts
    links: list[Link]
    cause: FailureCause | None = OMITTED_WHEN_NONE


class JobList(_Document):
    """A page of jobs, newest first."""

    jobs: list[StatusInfo]
    numberMatched: int  # noqa: N815
    numberReturned: int  # noqa: N815
    links: list[Link]


def job_url(request: Request, job_id: str) -> str:
    """Absolute URL of a job's status document."""
    return str(request.url_for("get_job", jobID=job_id))


def status_document(request: Request, record: JobRecord) -> StatusInfo:
    """The OGC status document of a job record, with its links."""
    url = job_url(request, record.job_id)
    links = [
        Link(href=url, rel="self", type=JSON, title="status of this job"),
        Link(href=str(request.url_for("list_jobs")), rel="up", type=JSON, title="all jobs"),
    ]
    if record.status == SUCCESSFUL:
        links.append(
            Link(href=f"{url}/results", rel=REL_RESULTS, type=JSON, title="results of this job")
        )
    scheduled: dict[str, Any] = {}
    if record.schedule_id is not None:
        schedule_url = str(request.url_for("get_schedule", scheduleID=record.schedule_id))
        links.append(
            Link(href=schedule_url, rel="related", type=JSON, title="the schedule that ran it")
        )
        scheduled["scheduleID"] = record.schedule_id
    if record.notification is not None:
        scheduled["notification"] = record.notification
    cause = FailureCause(**failure_cause(record.cause)) if record.status == FAILED else None
    message = record.message
    if cause is not None and not message.strip():  # a failed job always says why
        message = cause.title
    return StatusInfo(
        jobID=record.job_id,
        processID=record.process_id,
        status=record.status,
        message=message,
        created=record.created,
        started=record.started,
        finished=record.finished,
        updated=record.updated,
        progress=record.progress,
        tiles=TileCounts(done=record.tiles_done, total=record.tiles_total),
        links=links,
        cause=cause,
        **scheduled,
    )


def inline_refs(schema: Any, defs: dict[str, Any]) -> Any:
    """A JSON schema with its local ``#/$defs/...`` references replaced by their targets."""
    if isinstance(schema, dict):
        ref = schema.get("$ref")
        if isinstance(ref, str) and ref.startswith("#/$defs/"):
            target = inline_refs(defs[ref.removeprefix("#/$defs/")], defs)
            rest = {k: inline_refs(v, defs) for k, v in schema.items() if k != "$ref"}
            return {**target, **rest}
        return {k: inline_refs(v, defs) for k, v in schema.items() if k != "$defs"}
    if isinstance(schema, list):
        return [inline_refs(v, defs) for v in schema]
    return schema


# --- the job list's filters (OGC API - Processes 1.0, requirements class job-list) ------------

Interval = tuple[dt.datetime | None, dt.datetime | None]


def parse_datetime_filter(text: str) -> Interval:
    """The ``datetime`` parameter: an instant (start = end) or ``start/end`` with ``..`` (or
    nothing) for an open end, RFC 3339 date-times (a time without offset is UTC). Raises
    ValueError saying what is wrong."""
    parts = text.split("/")
    if len(parts) > 2:
        raise ValueError("give one date-time or an interval start/end")
    bounds = [_instant(p.strip()) for p in parts]
    if len(bounds) == 1:
        if bounds[0] is None:
            raise ValueError("an instant cannot be open ('..')")
        return bounds[0], bounds[0]
    start, end = bounds
    if start is not None and end is not None and start > end:
        raise ValueError("the interval ends before it starts")
    return start, end


def _instant(text: str) -> dt.datetime | None:
    if text in ("", ".."):
        return None
    try:
        value = dt.datetime.fromisoformat(text)
    except ValueError:
        raise ValueError(f"{text[:40]!r} is not an RFC 3339 date-time") from None
    return value if value.tzinfo is not None else value.replace(tzinfo=dt.UTC)


def job_duration_s(record: JobRecord, now: dt.datetime) -> float | None:
    """Seconds from the job's start to its end (now while it runs); None if it never started."""
    if record.started is None:
        return None
    end = record.finished or now
    return (_utc(end) - _utc(record.started)).total_seconds()


def _utc(value: dt.datetime) -> dt.datetime:
    return value if value.tzinfo is not None else value.replace(tzinfo=dt.UTC)


def job_matches(
    record: JobRecord,
    *,
    created: Interval | None = None,
    min_duration_s: float | None = None,
    max_duration_s: float | None = None,
    now: dt.datetime,
) -> bool:
    """Whether the job was created within the interval (inclusive) and ran at least
    min_duration_s and at most max_duration_s (a job that never started has no duration and
    matches no duration bound)."""
    if created is not None:
        start, end = created
        when = _utc(record.created)
        if (start is not None and when < start) or (end is not None and when > end):
            return False
    if min_duration_s is None and max_duration_s is None:
        return True
    duration = job_duration_s(record, now)
    if duration is None:
        return False
    if min_duration_s is not None and duration < min_duration_s:
        return False
    return max_duration_s is None or duration <= max_duration_s
