"""Jobs: the list, one job's status, dismissal, results, and read-only views of the results
(one tile, one region, the files of results.zarr)."""

from __future__ import annotations

import json
import pathlib
from functools import lru_cache
from typing import Annotated, Any

from fastapi import APIRouter, Path, Query, Request, Response
from fastapi.responses import FileResponse

from demaudit.service.api.auth import Principal
from demaudit.service.api.deps import DispatcherDep, PrincipalDep, StoreDep
from demaudit.service.api.execution import OUTPUTS
from demaudit.service.api.execution import forget as forget_execution
from demaudit.service.api.execution import load as load_execution
from demaudit.service.api.negotiation import AcceptsJson, negotiate
from demaudit.service.api.problems import (
    BadRequestError,
    JobFailedError,
    JobGoneError,
    NoSuchItemError,
    NoSuchJobError,
    ResultNotReadyError,
    failure_cause,
    responses,
)
from demaudit.service.api.routes.documents import (
    JSON,
    REL_RESULTS,
    JobList,
    StatusInfo,
    job_url,
    parse_datetime_filter,
    status_document,
)
from demaudit.service.api.routes.job_list import filtered_records, listed_statuses, page_links
from demaudit.service.run.dispatcher import PROCESS_ID, JobDispatcher
from demaudit.service.store.jobs import (
    ACCEPTED,
    DISMISSED,
    FAILED,
    RUNNING,
    JobRecord,
    JobStatus,
    JobStore,
)
from demaudit.workers.outputs.layout import SUMMARY_NAME, ZARR_NAME

router = APIRouter(prefix="/jobs", tags=["Jobs"], responses=responses(401, 406))

ZARR = "application/vnd+zarr"
MAX_OFFSET = 10**9
MAX_LIMIT = 10_000
"""The largest page (OGC API - Processes 1.0, job-list: limit up to 10,000)."""
JobId = Annotated[str, Path(alias="jobID", description="The job's id.")]


def _record(store: JobStore, job_id: str, principal: Principal) -> JobRecord:
    """The job's record when principal may see it; otherwise the same 404 as for a job that
    does not exist (ids of others' jobs do not leak)."""
    record = store.get(job_id) if len(job_id) <= 64 else None
    if record is None or not principal.may_access(record.owner):
        raise NoSuchJobError(f"there is no job {job_id!r}")
    return record


def _finished_output(dispatcher: JobDispatcher, record: JobRecord) -> pathlib.Path:
    """The output folder of a successful job; the right problem for any other status."""
    if record.status in (ACCEPTED, RUNNING):
        raise ResultNotReadyError(
            f"job {record.job_id} is {record.status} ({record.progress} %); "
            "its results are not ready"
        )
    if record.status == FAILED:
        raise JobFailedError(
            f"job {record.job_id} failed: {record.message}", cause=failure_cause(record.cause)
        )
    if record.status == DISMISSED:
        raise JobGoneError(f"job {record.job_id} was dismissed; it has no results")
    return dispatcher.results_path(record.job_id)


def _summary_of(dispatcher: JobDispatcher, record: JobRecord) -> dict[str, Any]:
    path = _finished_output(dispatcher, record) / SUMMARY_NAME
    try:
        stamp = path.stat().st_mtime_ns
    except OSError:
        raise JobGoneError(f"the results of job {record.job_id} are gone") from None
    return _load_summary(str(path), stamp)


@lru_cache(maxsize=8)
def _load_summary(path: str, stamp: int) -> dict[str, Any]:
    """summary.json (cached by path and modification time; treat as read-only)."""
    with open(path, encoding="utf-8") as f:
        document: dict[str, Any] = json.load(f)
    return document


@router.get("", name="list_jobs", response_model=JobList, responses=responses(400))
def list_jobs(
    request: Request,
    store: StoreDep,
    principal: PrincipalDep,
    status: Annotated[list[JobStatus] | None, Query(description="Only jobs in these.")] = None,
    process_id: Annotated[list[str] | None, Query(alias="processID")] = None,
    job_type: Annotated[
        list[str] | None, Query(alias="type", description="Only jobs of these types (process).")
    ] = None,
    datetime: Annotated[
        str | None,
        Query(
            description="Only jobs created at this instant or within this interval "
            "(RFC 3339, start/end, '..' for an open end).",
            max_length=100,
        ),
    ] = None,
    min_duration: Annotated[
        int | None, Query(alias="minDuration", ge=0, description="Seconds run, at least.")
    ] = None,
    max_duration: Annotated[
        int | None, Query(alias="maxDuration", ge=0, description="Seconds run, at most.")
    ] = None,
    limit: Annotated[
        int, Query(ge=1, description=f"Jobs per page (larger values count as {MAX_LIMIT}).")
    ] = 10,
    offset: Annotated[int, Query(ge=0, le=MAX_OFFSET)] = 0,
) -> JobList:
    """The caller's jobs (an admin's: all jobs), newest first; filter by status, processID,
    type, creation time and duration, and page with limit and offset."""
    negotiate(request, (JSON,))
    limit = min(limit, MAX_LIMIT)
    try:
        created = parse_datetime_filter(datetime) if datetime is not None else None
    except ValueError as exc:
        raise BadRequestError(f"query.datetime: {exc}") from None
    statuses = listed_statuses(status, process_id, job_type)
    owner = principal.owner_filter
    if created is None and min_duration is None and max_duration is None:
        matched = store.count(statuses=statuses, owner=owner)
        records = store.find(statuses=statuses, limit=limit, offset=offset, owner=owner)
    else:
        kept = filtered_records(
            store,
            statuses,
            owner=owner,
            created=created,
            min_duration_s=min_duration,
            max_duration_s=max_duration,
        )
        matched, records = len(kept), kept[offset : offset + limit]
    return JobList(
        jobs=[status_document(request, r) for r in records],
        numberMatched=matched,
        numberReturned=len(records),
        links=page_links(request, offset=offset, limit=limit, shown=len(records), matched=matched),
    )


@router.get("/{jobID}", name="get_job", response_model=StatusInfo, responses=responses(404))
def get_job(
    job_id: JobId, request: Request, store: StoreDep, principal: PrincipalDep
) -> StatusInfo:
    """The status of a job."""
    negotiate(request, (JSON,))
    return status_document(request, _record(store, job_id, principal))


@router.delete(
    "/{jobID}",
    name="dismiss_job",
    dependencies=[AcceptsJson],
    response_model=StatusInfo,
    responses=responses(404),
)
def dismiss_job(
    job_id: JobId,
    request: Request,
    store: StoreDep,
    dispatcher: DispatcherDep,
    principal: PrincipalDep,
) -> StatusInfo:
    """Dismiss a job: stop it (its tile tasks are cancelled on the cluster), drop its results."""
    _record(store, job_id, principal)
    record = dispatcher.dismiss(job_id)
    if record is None:
        raise NoSuchJobError(f"there is no job {job_id!r}")
    forget_execution(dispatcher.results_dir, job_id)
    return status_document(request, record)


@router.get(
    "/{jobID}/results",
    name="job_results",
    dependencies=[AcceptsJson],
    responses=responses(404, 409, 410),
)
def job_results(
    job_id: JobId,
    request: Request,
    store: StoreDep,
    dispatcher: DispatcherDep,
    principal: PrincipalDep,
) -> Any:
    """The results of a successful job: a results document with the outputs asked for at
    execution (summary as a qualified value, results.zarr by reference), or, when the
    execution asked for ``response: raw``, the one output asked for as is."""
    record = _record(store, job_id, principal)
    summary = _summary_of(dispatcher, record)
    execution = load_execution(dispatcher.results_dir, job_id)
    if execution.response == "raw":  # one output (OGC 18-062r2, job-results-async-raw-*)
        return summary if execution.outputs == ("summary",) else _results_by_link(request, job_id)
    outputs = {
        "summary": {"value": summary, "mediaType": JSON},
        "results": _results_link(request, job_id),
    }
    return {name: outputs[name] for name in execution.outputs if name in outputs}


def _results_link(request: Request, job_id: str) -> dict[str, Any]:
    return {
        "href": f"{job_url(request, job_id)}/results.zarr",
        "type": ZARR,
        "title": "results.zarr (read with xarray.open_zarr(href, group=...))",
    }


@router.get(
    "/{jobID}/results/{outputID}",
    name="job_output",
    responses={
        **responses(404, 409, 410),
        204: {"description": "results (by reference): a Link header names results.zarr."},
    },
)
def job_output(
    job_id: JobId,
    output_id: Annotated[str, Path(alias="outputID", description="summary or results.")],
    request: Request,
    store: StoreDep,
    dispatcher: DispatcherDep,
    principal: PrincipalDep,
) -> Any:
    """One output of a successful job: summary (the document itself), or results (by
    reference: 204 with a Link header naming results.zarr)."""
    if output_id not in OUTPUTS:
        raise NoSuchItemError(
            f"process {PROCESS_ID} has no output {output_id!r}; its outputs are "
            f"{', '.join(OUTPUTS)}"
        )
    if output_id == "summary":
        negotiate(request, (JSON,))
    summary = _summary_of(dispatcher, _record(store, job_id, principal))
    if output_id == "summary":
        return summary
    return _results_by_link(request, job_id)


def _results_by_link(request: Request, job_id: str) -> Response:
    """results.zarr by reference, raw: 204 with a Link header (OGC 18-062r2,
    /req/core/process-execute-sync-raw-ref)."""
    link = _results_link(request, job_id)
    return Response(
        status_code=204,
        headers={"Link": f'<{link["href"]}>; rel="{REL_RESULTS}"; type="{ZARR}"'},
    )


@router.get(
    "/{jobID}/tiles/{tile}",
    name="job_tile",
    dependencies=[AcceptsJson],
    responses=responses(404, 409, 410),
)
def job_tile(
    job_id: JobId,
    tile: str,
    request: Request,
    store: StoreDep,
    dispatcher: DispatcherDep,
    principal: PrincipalDep,
) -> dict[str, Any]:
    """One test tile of a successful job: status, reason, bounds and statistics."""
    record = _record(store, job_id, principal)
    return _summary_item(request, dispatcher, record, kind="tile", key=tile)


@router.get(
    "/{jobID}/regions/{region}",
    name="job_region",
    dependencies=[AcceptsJson],
    responses=responses(404, 409, 410),
)
def job_region(
    job_id: JobId,
    region: str,
    request: Request,
    store: StoreDep,
    dispatcher: DispatcherDep,
    principal: PrincipalDep,
) -> dict[str, Any]:
    """One region of a successful job: statistics, outlier-free statistics and strata."""
    record = _record(store, job_id, principal)
    return _summary_item(request, dispatcher, record, kind="region", key=region)


def _summary_item(
    request: Request, dispatcher: JobDispatcher, record: JobRecord, *, kind: str, key: str
) -> dict[str, Any]:
    """The entry of summary.json's list of kind ("tile": ``tiles``, "region": ``regions``)
    whose kind field is key, with the item's links; NoSuchItemError when there is none."""
    for entry in _summary_of(dispatcher, record)[f"{kind}s"]:
        if entry[kind] == key:
            return entry | {"links": _item_links(request, record.job_id)}
    raise NoSuchItemError(f"job {record.job_id} has no {kind} {key!r}")


@router.get(
    "/{jobID}/results.zarr/{path:path}", name="job_results_file", responses=responses(404, 409, 410)
)
def job_results_file(
    job_id: JobId,
    path: str,
    store: StoreDep,
    dispatcher: DispatcherDep,
    principal: PrincipalDep,
) -> FileResponse:
    """A file of the job's results.zarr (read-only), so Zarr readers can open it over HTTP."""
    zarr_dir = _finished_output(dispatcher, _record(store, job_id, principal)) / ZARR_NAME
    try:
        root = zarr_dir.resolve(strict=True)
        target = (root / path).resolve(strict=True)
    except (OSError, ValueError, RuntimeError):
        raise NoSuchItemError(f"results.zarr of job {job_id} has no file {path!r}") from None
    if not target.is_relative_to(root) or not target.is_file():
        raise NoSuchItemError(f"results.zarr of job {job_id} has no file {path!r}")
    media = JSON if target.suffix == ".json" else "application/octet-stream"
    return FileResponse(target, media_type=media)


def _item_links(request: Request, job_id: str) -> list[dict[str, Any]]:
    url = job_url(request, job_id)
    return [
        {"href": str(request.url), "rel": "self", "type": JSON},
        {"href": f"{url}/results", "rel": "up", "type": JSON, "title": "results of the job"},
    ]
