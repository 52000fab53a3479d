"""The job list's parts: which statuses it shows, filters the store cannot apply, page links."""

from __future__ import annotations

from fastapi import Request

from demaudit.service.api.routes.documents import JSON, Interval, Link, job_matches
from demaudit.service.run.dispatcher import PROCESS_ID
from demaudit.service.store.jobs import (
    DISMISSED,
    FAILED,
    RUNNING,
    SUCCESSFUL,
    JobRecord,
    JobStatus,
    JobStore,
    utc_now,
)

__all__ = ["LISTED_BY_DEFAULT", "filtered_records", "listed_statuses", "page_links"]

LISTED_BY_DEFAULT = (RUNNING, SUCCESSFUL, FAILED, DISMISSED)
"""The statuses /jobs lists when no status is asked for (not accepted: OGC 18-062r2,
/req/job-list/status-response)."""


def listed_statuses(
    status: list[JobStatus] | None, process_id: list[str] | None, job_type: list[str] | None
) -> set[JobStatus]:
    """The statuses a job list shows (none when processID or type exclude this process)."""
    # OGC 18-062r2, /req/job-list/status-response: without a status parameter only running
    # and finished jobs are listed (a waiting job: status=accepted)
    statuses = set(status) if status else set(LISTED_BY_DEFAULT)
    if process_id is not None and PROCESS_ID not in process_id:
        return set()
    if job_type is not None and "process" not in job_type:
        return set()
    return statuses


def filtered_records(
    store: JobStore,
    statuses: set[JobStatus],
    *,
    owner: str | None,
    created: Interval | None,
    min_duration_s: int | None,
    max_duration_s: int | None,
) -> list[JobRecord]:
    """Filters the store cannot apply: over every record of the caller, newest first."""
    everything = store.find(
        statuses=statuses,
        limit=max(1, store.count(statuses=statuses, owner=owner)),
        offset=0,
        owner=owner,
    )
    now = utc_now()
    return [
        r
        for r in everything
        if job_matches(
            r,
            created=created,
            min_duration_s=min_duration_s,
            max_duration_s=max_duration_s,
            now=now,
        )
    ]


def page_links(
    request: Request, *, offset: int, limit: int, shown: int, matched: int
) -> list[Link]:
    """self, and next / prev when there are more jobs after / before this page."""
    links = [Link(href=str(request.url), rel="self", type=JSON, title="this page")]
    if offset + shown < matched:
        links.append(
            Link(
                href=str(request.url.include_query_params(offset=offset + limit, limit=limit)),
                rel="next",
                type=JSON,
                title="the next page",
            )
        )
    if offset > 0:
        links.append(
            Link(
                href=str(
                    request.url.include_query_params(offset=max(0, offset - limit), limit=limit)
                ),
                rel="prev",
                type=JSON,
                title="the previous page",
            )
        )
    return links
