"""Problem documents (RFC 7807) and the one place where exceptions become HTTP responses.

Hierarchy of the errors the routes raise::

    ProblemError                 an HTTP problem with its status, type and title
    ├── NoSuchProcessError  404  OGC no-such-process
    ├── NoSuchJobError      404  OGC no-such-job
    ├── ResultNotReadyError 404  OGC result-not-ready (job accepted or running)
    ├── NoSuchItemError     404  unknown tile, region or results file of a job
    ├── NoSuchScheduleError 404  unknown schedule
    ├── JobFailedError      409  results asked of a failed job
    ├── JobGoneError        410  results asked of a dismissed job
    ├── BadRequestError     400  malformed request (not JSON, wrong shape)
    ├── UnauthorizedError   401  missing or wrong bearer token
    ├── BodyTooLargeError   413  request body over the configured limit
    └── WebhookNotAllowedError 422  a schedule's webhook may not be called (scheme, address)

A failed job's results are 409 ``job-failed`` whatever the cause; the problem's ``cause`` member
(``failure_cause``) tells bad input (422-like), an unreadable tile (422-like,
``tile-unreadable``) from exhausted resources, a cluster fault, an
interruption and an internal error. A submission while the Dask scheduler does not answer
(demaudit.service.run.cluster.ClusterUnavailableError) is 503 ``cluster-unavailable`` with
Retry-After.

``install(app)`` also maps the pipeline's own errors (``demaudit.workers.errors``): a path outside
the data roots (DataRootError) is 403, a tile that cannot be read (TileReadError) is 422
``tile-unreadable``, any other invalid spec (SpecError and its kin) is 422, request
validation errors are 400 (query, path, headers, malformed JSON) or 422 (the body's content),
and anything unexpected is a 500 that says nothing of its cause (the log has it). Details name
the field at fault and never echo file contents or submitted values.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping, Sequence
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from pydantic import BaseModel, ConfigDict, Field
from starlette.exceptions import HTTPException as StarletteHTTPException

from demaudit.service.run.cluster import ClusterUnavailableError
from demaudit.workers.errors import AuditError, DataRootError, TileReadError

__all__ = [
    "MEDIA_TYPE",
    "BadRequestError",
    "BodyTooLargeError",
    "JobGoneError",
    "JobFailedError",
    "NoSuchItemError",
    "NoSuchJobError",
    "NoSuchProcessError",
    "NoSuchScheduleError",
    "Problem",
    "ProblemError",
    "ResultNotReadyError",
    "UnauthorizedError",
    "WebhookNotAllowedError",
    "failure_cause",
    "install",
    "problem_response",
    "responses",
]

MEDIA_TYPE = "application/problem+json"
OGC_EXCEPTIONS = "http://www.opengis.net/def/exceptions/ogcapi-processes-1/1.0/"
_OWN = "urn:demaudit:problem:"

log = logging.getLogger("demaudit.api")


class Problem(BaseModel):
    """An RFC 7807 problem document."""

    model_config = ConfigDict(extra="allow")

    type: str = Field(description="URI naming the kind of problem.")
    title: str
    status: int
    detail: str
    instance: str | None = None


class ProblemError(Exception):
    """An error with an HTTP problem document; subclasses fix status, type and title."""

    status = 500
    type = "about:blank"
    title = "Internal Server Error"
    headers: Mapping[str, str] = {}

    def __init__(self, detail: str, **extensions: Any) -> None:
        super().__init__(detail)
        self.detail = detail
        self.extensions = extensions


class NoSuchProcessError(ProblemError):
    status, type, title = 404, OGC_EXCEPTIONS + "no-such-process", "No such process"


class NoSuchJobError(ProblemError):
    status, type, title = 404, OGC_EXCEPTIONS + "no-such-job", "No such job"


class ResultNotReadyError(ProblemError):
    status, type, title = 404, OGC_EXCEPTIONS + "result-not-ready", "Result not ready"


class NoSuchItemError(ProblemError):
    status, type, title = 404, _OWN + "no-such-item", "Not found"


class NoSuchScheduleError(ProblemError):
    status, type, title = 404, _OWN + "no-such-schedule", "No such schedule"


class JobFailedError(ProblemError):
    status, type, title = 409, _OWN + "job-failed", "The job failed"


class JobGoneError(ProblemError):
    status, type, title = 410, _OWN + "job-dismissed", "The job was dismissed"


class BadRequestError(ProblemError):
    status, type, title = 400, _OWN + "bad-request", "Bad request"


class UnauthorizedError(ProblemError):
    status, type, title = 401, _OWN + "unauthorized", "Unauthorized"
    headers = {"WWW-Authenticate": 'Bearer realm="demaudit"'}


class BodyTooLargeError(ProblemError):
    status, type, title = 413, _OWN + "body-too-large", "Request body too large"


class WebhookNotAllowedError(ProblemError):
    status, type, title = 422, _OWN + "webhook-refused", "Webhook refused"


FAILURE_CAUSES: dict[str, tuple[int, str]] = {
    "invalid-input": (422, "The job's input cannot be used"),
    "tile-unreadable": (422, "A tile of the job cannot be read"),
    "resources-exhausted": (507, "The server ran out of disk or memory"),
    "cluster-unavailable": (503, "The Dask cluster could not run the job"),
    "interrupted": (503, "The server stopped while the job ran"),
    "internal": (500, "Internal error"),
}
"""A failed job's cause (demaudit.service.run.faults.CAUSES) -> the status and title its
problem would have."""


def failure_cause(cause: str | None) -> dict[str, Any]:
    """The ``cause`` member of a failed job's problem: type, title and the like status."""
    status, title = FAILURE_CAUSES.get(cause or "internal", FAILURE_CAUSES["internal"])
    known = cause if cause in FAILURE_CAUSES else "internal"
    return {"type": _OWN + known, "title": title, "status": status}


_FORBIDDEN = (403, _OWN + "outside-data-roots", "Path outside the data roots")
_INVALID_SPEC = (422, _OWN + "invalid-spec", "Invalid job spec")
_TILE_UNREADABLE = (422, _OWN + "tile-unreadable", "Tile cannot be read")
_INVALID_REQUEST = (400, _OWN + "invalid-parameter", "Invalid request parameter")
_INTERNAL = (500, "about:blank", "Internal Server Error")


def problem_response(
    status: int,
    *,
    type: str,  # noqa: A002 - the RFC's member name
    title: str,
    detail: str,
    instance: str | None = None,
    headers: Mapping[str, str] | None = None,
    **extensions: Any,
) -> JSONResponse:
    """A JSON response carrying a problem document."""
    body: dict[str, Any] = {"type": type, "title": title, "status": status, "detail": detail}
    if instance:
        body["instance"] = instance
    body.update(extensions)
    return JSONResponse(
        body, status_code=status, headers=dict(headers or {}), media_type=MEDIA_TYPE
    )


def responses(*statuses: int) -> dict[int | str, dict[str, Any]]:
    """OpenAPI ``responses`` entries documenting problem documents for these statuses."""
    return {
        status: {
            "model": Problem,
            "content": {MEDIA_TYPE: {}},
            "description": _DESCRIPTIONS[status],
        }
        for status in statuses
    }


_DESCRIPTIONS = {
    400: "Malformed request (problem document).",
    401: "Missing or wrong bearer token (problem document).",
    403: "A path of the spec lies outside the data roots (problem document).",
    404: "No such process, job, schedule, tile, region or file; or the result is not ready.",
    409: "The job failed (problem document with its reason).",
    410: "The job was dismissed (problem document).",
    406: "The Accept header allows none of the media types offered (problem document).",
    413: "Request body too large (problem document).",
    422: "Invalid job spec or a refused webhook; the detail names each field at fault "
    "(problem document).",
}


def install(app: FastAPI) -> None:
    """Register the exception handlers: the one place exceptions become HTTP responses."""
    app.add_exception_handler(ProblemError, _problem)
    app.add_exception_handler(RequestValidationError, _validation)
    app.add_exception_handler(StarletteHTTPException, _http)
    app.add_exception_handler(AuditError, _audit)
    app.add_exception_handler(ClusterUnavailableError, _unavailable)
    app.add_exception_handler(Exception, _internal)


async def _problem(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, ProblemError)
    return problem_response(
        exc.status,
        type=exc.type,
        title=exc.title,
        detail=exc.detail,
        instance=request.url.path,
        headers=exc.headers,
        **exc.extensions,
    )


async def _validation(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, RequestValidationError)
    errors = [_field_error(e) for e in exc.errors()]
    if any(e["type"] == "json_invalid" for e in exc.errors()):
        status, type_, title = 400, BadRequestError.type, "Request body is not valid JSON"
    elif all(e["field"].startswith("body") for e in errors):
        status, type_, title = _INVALID_SPEC
    else:
        status, type_, title = _INVALID_REQUEST
    detail = "; ".join(f"{e['field']}: {e['message']}" for e in errors)
    return problem_response(
        status,
        type=type_,
        title=title,
        detail=detail,
        instance=request.url.path,
        errors=errors,
    )


def _field_error(error: Mapping[str, Any]) -> dict[str, str]:
    """Field path and message of one validation error; the submitted value is left out."""
    loc: Sequence[Any] = error.get("loc", ())
    field = ".".join(str(p) for p in loc) or "body"
    message = str(error.get("msg", "invalid")).removeprefix("Value error, ")
    if error.get("type") == "extra_forbidden":
        message = "unknown key"
    if error.get("type") == "json_invalid":
        ctx = error.get("ctx") or {}
        message = f"not valid JSON ({ctx.get('error', 'parse error')})"
    return {"field": field, "message": message, "type": str(error.get("type", ""))}


async def _http(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, StarletteHTTPException)
    title = {404: "Not found", 405: "Method not allowed"}.get(exc.status_code, "HTTP error")
    detail = exc.detail if isinstance(exc.detail, str) else title
    return problem_response(
        exc.status_code,
        type="about:blank",
        title=title,
        detail=detail,
        instance=request.url.path,
        headers=exc.headers,
    )


async def _audit(request: Request, exc: Exception) -> JSONResponse:
    if isinstance(exc, DataRootError):
        status, type_, title = _FORBIDDEN
    elif isinstance(exc, TileReadError):
        status, type_, title = _TILE_UNREADABLE
    else:
        status, type_, title = _INVALID_SPEC
    return problem_response(
        status, type=type_, title=title, detail=str(exc), instance=request.url.path
    )


async def _unavailable(request: Request, exc: Exception) -> JSONResponse:
    return problem_response(
        503,
        type=_OWN + "cluster-unavailable",
        title="Cluster unavailable",
        detail=str(exc),
        instance=request.url.path,
        headers={"Retry-After": "10"},
    )


async def _internal(request: Request, exc: Exception) -> JSONResponse:
    log.error("unexpected error on %s %s", request.method, request.url.path, exc_info=exc)
    status, type_, title = _INTERNAL
    return problem_response(
        status,
        type=type_,
        title=title,
        detail="unexpected server error (details are in the server log)",
        instance=request.url.path,
    )
