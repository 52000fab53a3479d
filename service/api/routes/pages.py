"""Pages for people: the job list and one job's page, and a job's report.html and figures.

::

    browser navigation  GET /jobs, /jobs/{jobID}   (Accept prefers text/html, or ?f=html)
        └─► PageRoute matches ─► template shell: no job data, so no token needed
    any other request on those paths falls through to routes/jobs.py (JSON, token required)

    static/jobpage.js (in the shell) ─► fetch JSON with 'Authorization: Bearer <token>'
        (the token is typed once and kept in the tab's sessionStorage, never in a URL)
        ─► GET /jobs/{jobID}/report, /jobs/{jobID}/figures/{name}   (token required)
        ─► the report shown in a sandboxed frame (no script runs in it)

Every page carries a Content-Security-Policy: scripts from this origin only (no inline script),
requests to this origin only, no form posts, no framing by other sites.
"""

from __future__ import annotations

import pathlib
from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import FileResponse, HTMLResponse
from fastapi.routing import APIRoute
from fastapi.templating import Jinja2Templates
from starlette.routing import Match
from starlette.types import Scope

from demaudit.service.api.deps import DispatcherDep, PrincipalDep, StoreDep
from demaudit.service.api.negotiation import HTML, JSON, choose
from demaudit.service.api.problems import NoSuchItemError, responses
from demaudit.service.api.routes.jobs import JobId, _finished_output, _record, _summary_of
from demaudit.workers.outputs.layout import REPORT_NAME

__all__ = ["PAGE_CSP", "REPORT_CSP", "STATIC_DIR", "PageRoute", "pages", "reports", "wants_page"]

PACKAGE = pathlib.Path(__file__).resolve().parents[1]
STATIC_DIR = PACKAGE / "static"
templates = Jinja2Templates(directory=PACKAGE / "templates")

PAGE_CSP = (
    "default-src 'none'; script-src 'self'; connect-src 'self'; img-src 'self' data:; "
    "style-src 'self' 'unsafe-inline'; base-uri 'none'; form-action 'none'; "
    "frame-ancestors 'none'"
)
"""The pages' policy. Inline styles are allowed for the report, which the page shows in a
srcdoc frame (such a frame inherits this policy); inline scripts are not."""
REPORT_CSP = "sandbox; default-src 'none'; img-src 'self' data:; style-src 'unsafe-inline'"
"""report.html opened on its own: no script, no requests beyond its figures, an opaque origin."""
_PAGE_HEADERS = {
    "Content-Security-Policy": PAGE_CSP,
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "Cache-Control": "no-cache",
    "Vary": "Accept",
}


def wants_page(scope: Scope) -> bool:
    """Whether a request asks for the HTML page: ``f=html`` in the query, or an Accept header
    preferring text/html to JSON (a browser's navigation does; programs get JSON by default)."""
    query = scope.get("query_string", b"").decode("latin-1")
    formats = [p[2:] for p in query.split("&") if p.startswith("f=")]
    if formats:
        return formats[-1] == "html"
    accept = None
    for name, value in scope.get("headers") or []:
        if name == b"accept":
            accept = value.decode("latin-1")
    return choose(accept, (JSON, HTML)) == HTML


class PageRoute(APIRoute):
    """A route that matches only requests asking for the page (``wants_page``); the others go
    on to the route of the same path that answers JSON."""

    def matches(self, scope: Scope) -> tuple[Match, Scope]:
        match, child = super().matches(scope)
        if match is not Match.NONE and not wants_page(scope):
            return Match.NONE, {}
        return match, child


pages = APIRouter(prefix="/jobs", route_class=PageRoute, include_in_schema=False)
"""The shells (no authentication: they hold no data). Include before routes/jobs.py."""
reports = APIRouter(prefix="/jobs", tags=["Jobs"], responses=responses(401))
"""The report and its figures (include with the Authorized dependency)."""


def _file_responses(media: str, description: str) -> dict[int | str, dict[str, Any]]:
    ok: dict[int | str, dict[str, Any]] = {
        200: {"content": {media: {}}, "description": description}
    }
    return ok | responses(404, 409, 410)


def _page(request: Request, template: str, **context: Any) -> HTMLResponse:
    base = request.scope.get("root_path", "").rstrip("/")
    return templates.TemplateResponse(
        request, template, {"base": base, **context}, headers=_PAGE_HEADERS
    )


@pages.get("", name="jobs_page", response_class=HTMLResponse)
def jobs_page(request: Request) -> HTMLResponse:
    """The job list (filled in by the script)."""
    return _page(request, "jobs.html")


@pages.get("/{jobID}", name="job_page", response_class=HTMLResponse)
def job_page(job_id: JobId, request: Request) -> HTMLResponse:
    """One job's page: status and progress while it runs, then its report."""
    return _page(request, "job.html", job_id=job_id)


@reports.get(
    "/{jobID}/report",
    name="job_report",
    response_class=FileResponse,
    responses=_file_responses(HTML, REPORT_NAME),
)
def job_report(
    job_id: JobId, store: StoreDep, dispatcher: DispatcherDep, principal: PrincipalDep
) -> FileResponse:
    """The report of a successful job (report.html; its figures at ``figures/{name}``)."""
    out = _finished_output(dispatcher, _record(store, job_id, principal))
    path = out / REPORT_NAME
    if not path.is_file():
        raise NoSuchItemError(f"job {job_id} has no report.html (see the cautions of its results)")
    return FileResponse(path, media_type=HTML, headers=_file_headers(REPORT_CSP))


@reports.get(
    "/{jobID}/figures/{name}",
    name="job_figure",
    response_class=FileResponse,
    responses=_file_responses("image/png", "the figure"),
)
def job_figure(
    job_id: JobId,
    name: str,
    store: StoreDep,
    dispatcher: DispatcherDep,
    principal: PrincipalDep,
) -> FileResponse:
    """A figure of a successful job's report (one of the names its summary lists)."""
    record = _record(store, job_id, principal)
    listed = _summary_of(dispatcher, record).get("figures") or []
    path = dispatcher.results_path(record.job_id) / name
    if name not in listed or not path.is_file():
        raise NoSuchItemError(f"job {job_id} has no figure {name!r}")
    media = "image/svg+xml" if path.suffix == ".svg" else "image/png"
    return FileResponse(path, media_type=media, headers=_file_headers(REPORT_CSP))


def _file_headers(csp: str) -> dict[str, str]:
    return {"Content-Security-Policy": csp, "X-Content-Type-Options": "nosniff"}
