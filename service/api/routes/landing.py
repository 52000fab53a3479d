"""The landing page and the conformance declaration (OGC API - Common)."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request

from demaudit.service.api.negotiation import AcceptsJson
from demaudit.service.api.problems import responses
from demaudit.service.api.routes.documents import (
    JSON,
    REL_CONFORMANCE,
    REL_JOB_LIST,
    REL_PROCESSES,
    Link,
)

router = APIRouter(tags=["Capabilities"], responses=responses(401, 406), dependencies=[AcceptsJson])

CONFORMANCE = [
    "http://www.opengis.net/spec/ogcapi-processes-1/1.0/conf/core",
    "http://www.opengis.net/spec/ogcapi-processes-1/1.0/conf/ogc-process-description",
    "http://www.opengis.net/spec/ogcapi-processes-1/1.0/conf/json",
    "http://www.opengis.net/spec/ogcapi-processes-1/1.0/conf/oas30",
    "http://www.opengis.net/spec/ogcapi-processes-1/1.0/conf/job-list",
    "http://www.opengis.net/spec/ogcapi-processes-1/1.0/conf/dismiss",
]


@router.get("/", name="landing_page")
def landing_page(request: Request) -> dict[str, Any]:
    """Landing page: what this API offers, as links."""
    links = [
        Link(
            href=str(request.url_for("landing_page")), rel="self", type=JSON, title="this document"
        ),
        Link(
            href=str(request.url_for("openapi")),
            rel="service-desc",
            type="application/vnd.oai.openapi+json;version=3.0",
            title="the API definition",
        ),
        Link(
            href=str(request.url_for("swagger_ui_html")),
            rel="service-doc",
            type="text/html",
            title="the API documentation",
        ),
        Link(
            href=str(request.url_for("conformance")),
            rel=REL_CONFORMANCE,
            type=JSON,
            title="conformance classes implemented",
        ),
        Link(
            href=str(request.url_for("list_processes")),
            rel=REL_PROCESSES,
            type=JSON,
            title="the processes",
        ),
        Link(href=str(request.url_for("list_jobs")), rel=REL_JOB_LIST, type=JSON, title="the jobs"),
    ]
    return {
        "title": "demaudit",
        "description": "Audits the vertical accuracy of tiled DEMs against a reference "
        "(OGC API - Processes - Part 1: Core).",
        "links": [link.model_dump(exclude_none=True) for link in links],
    }


@router.get("/conformance", name="conformance")
def conformance() -> dict[str, list[str]]:
    """The conformance classes this API implements."""
    return {"conformsTo": CONFORMANCE}
