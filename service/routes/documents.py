"""The OGC API - Processes documents the routes return (JSON), and how job records become them."""

from __future__ import annotations

import datetime as dt
from typing import Any, Literal

from fastapi import Request
from pydantic import BaseModel, ConfigDict, Field

from service.jobstore import SUCCESSFUL, JobRecord, JobStatus

REL_RESULTS = "http://www.opengis.net/def/rel/ogc/1.0/results"
REL_EXECUTE = "http://www.opengis.net/def/rel/ogc/1.0/execute"
REL_PROCESSES = "http://www.opengis.net/def/rel/ogc/1.0/processes"
REL_JOB_LIST = "http://www.opengis.net/def/rel/ogc/1.0/job-list"
REL_CONFORMANCE = "http://www.opengis.net/def/rel/ogc/1.0/conformance"
JSON = "application/json"


class Link(BaseModel):
    """A web link."""

    href: str
    rel: str
    type: str | None = None
    title: str | None = None


class _Document(BaseModel):
    model_config = ConfigDict(extra="allow")


class TileCounts(BaseModel):
    """Test tiles finished and in all (known once the catalog is read)."""

    done: int
    total: int


class StatusInfo(_Document):
    """The status of one job (OGC statusInfo)."""

    jobID: str  # noqa: N815 - the standard's member names
    type: Literal["process"] = "process"
    processID: str  # noqa: N815
    status: JobStatus
    message: str
    created: dt.datetime
    started: dt.datetime | None = None
    finished: dt.datetime | None = None
    updated: dt.datetime
    progress: int = Field(ge=0, le=100)
    tiles: TileCounts
    links: list[Link]


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
    return StatusInfo(
        jobID=record.job_id,
        processID=record.process_id,
        status=record.status,
        message=record.message,
        created=record.created,
        started=record.started,
        finished=record.finished,
        updated=record.updated,
        progress=record.progress,
        tiles=TileCounts(done=record.tiles_done, total=record.tiles_total),
        links=links,
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
