"""The process list, the description of ``dem-audit`` and its (asynchronous) execution."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from fastapi import APIRouter, Header, Request, Response
from fastapi import Path as PathParam
from fastapi.exceptions import RequestValidationError
from pydantic import BaseModel, ConfigDict, Field, ValidationError, WithJsonSchema

from demaudit.service.api.deps import DispatcherDep, PrincipalDep, SettingsDep
from demaudit.service.api.execution import Execution, spec_inputs
from demaudit.service.api.execution import save as save_execution
from demaudit.service.api.negotiation import AcceptsJson
from demaudit.service.api.openapi import oas30_schema
from demaudit.service.api.problems import NoSuchProcessError, responses
from demaudit.service.api.routes.documents import (
    JSON,
    REL_EXECUTE,
    Link,
    StatusInfo,
    inline_refs,
    status_document,
)
from demaudit.service.run.dispatcher import PROCESS_ID
from demaudit.workers import spec as job_spec
from demaudit.workers.spec import JobSpec

ProcessId = Annotated[str, PathParam(alias="processID", description="The process's id.")]

router = APIRouter(
    prefix="/processes",
    tags=["Processes"],
    responses=responses(401, 406),
    dependencies=[AcceptsJson],
)

VERSION = "0.1.0"
TITLE = "Audit the vertical accuracy of a tiled DEM"
DESCRIPTION = (
    "Differences a tiled test DEM against a reference on the test grid and one vertical datum "
    "(dh = test - reference, metres) on the Dask cluster, and reports robust statistics per "
    "tile, region, stratum and for the whole release. The inputs are the job spec's top-level "
    "keys; relative paths resolve against the server's first data root and every path must lie "
    "inside the data roots."
)


def _with_references(schema: dict[str, Any]) -> dict[str, Any]:
    """An input's schema, also as a qualified value or a reference (execute.yaml's forms)."""
    qualified = {
        "type": "object",
        "required": ["value"],
        "properties": {"value": schema, "mediaType": {"type": "string", "enum": [JSON]}},
        "additionalProperties": False,
    }
    reference = {
        "type": "object",
        "required": ["href"],
        "properties": {
            "href": {
                "type": "string",
                "description": "A JSON or YAML file inside the data roots (relative to the "
                "first root, or file://); remote URLs are not supported.",
            },
            "type": {"type": "string"},
            "rel": {"type": "string"},
            "title": {"type": "string"},
        },
        "additionalProperties": False,
    }
    return {"anyOf": [schema, qualified, reference]}


def _inputs_schema() -> dict[str, Any]:
    """JSON schema of an execute request's inputs: the job spec's keys, each inline, qualified
    ({"value": ...}) or by reference ({"href": ...})."""
    schema = JobSpec.model_json_schema()
    defs = schema.get("$defs", {})
    return {
        "type": "object",
        "description": "The job spec (see the process description): each input inline, as "
        'a qualified value {"value": ...} or by reference {"href": ...} to a file inside the '
        "data roots.",
        "required": schema.get("required", []),
        "properties": {
            name: _with_references(inline_refs(prop, defs))
            for name, prop in schema["properties"].items()
        },
        "additionalProperties": False,
    }


class ExecuteRequest(BaseModel):
    """An OGC execute request: the job spec as ``inputs``."""

    model_config = ConfigDict(extra="forbid")

    inputs: Annotated[dict[str, Any], WithJsonSchema(_inputs_schema())]
    outputs: dict[str, Any] | None = Field(
        default=None,
        description="The outputs the results show (summary, results; default both), each "
        "with an optional format.mediaType and transmissionMode.",
    )
    response: Literal["document", "raw"] = Field(
        default="document",
        description="'document': a results document; 'raw': the one output 'summary' as is.",
    )
    subscriber: dict[str, Any] | None = Field(
        default=None, description="Not supported (no 'callback' conformance class): refused."
    )


def _summary(request: Request) -> dict[str, Any]:
    return {
        "id": PROCESS_ID,
        "version": VERSION,
        "title": TITLE,
        "description": DESCRIPTION,
        "jobControlOptions": ["async-execute", "dismiss"],
        "outputTransmission": ["value", "reference"],
        "links": [
            Link(
                href=str(request.url_for("describe_process", processID=PROCESS_ID)),
                rel="self",
                type=JSON,
                title="process description",
            ).model_dump(exclude_none=True),
            Link(
                href=str(request.url_for("execute", processID=PROCESS_ID)),
                rel=REL_EXECUTE,
                type=JSON,
                title="execute this process",
            ).model_dump(exclude_none=True),
        ],
    }


def _inputs() -> dict[str, Any]:
    schema = JobSpec.model_json_schema()
    defs = schema.get("$defs", {})
    required = set(schema.get("required", ()))
    inputs = {}
    for name, prop in schema["properties"].items():
        prop = oas30_schema(inline_refs(prop, defs))
        inputs[name] = {
            "title": prop.pop("title", name),
            "description": prop.get("description", ""),
            "schema": prop,
            "minOccurs": 1 if name in required else 0,
            "maxOccurs": 1,
        }
    return inputs


_OUTPUTS = {
    "summary": {
        "title": "summary document",
        "description": "summary.json: job, overall, regions, tiles and cautions.",
        "schema": {"type": "object", "contentMediaType": JSON},
    },
    "results": {
        "title": "results store",
        "description": "results.zarr (Zarr v3, consolidated metadata): tiles, regions, strata, "
        "dh_overview and tile_summaries groups; served read-only by this API.",
        "schema": {"type": "string", "contentMediaType": "application/vnd+zarr"},
    },
}


def _check_process(process_id: str) -> None:
    if process_id != PROCESS_ID:
        raise NoSuchProcessError(
            f"there is no process {process_id!r}; the one process is {PROCESS_ID!r}"
        )


@router.get("", name="list_processes")
def list_processes(request: Request) -> dict[str, Any]:
    """The processes this server offers (one: dem-audit)."""
    return {
        "processes": [_summary(request)],
        "links": [{"href": str(request.url_for("list_processes")), "rel": "self", "type": JSON}],
    }


@router.get("/{processID}", name="describe_process", responses=responses(404))
def describe_process(process_id: ProcessId, request: Request) -> dict[str, Any]:
    """The description of a process: its inputs (the job spec) and outputs."""
    _check_process(process_id)
    return _summary(request) | {"inputs": _inputs(), "outputs": _OUTPUTS}


@router.post(
    "/{processID}/execution",
    name="execute",
    status_code=201,
    response_model=StatusInfo,
    responses=responses(400, 403, 404, 406, 413, 422),
)
def execute(
    process_id: ProcessId,
    body: ExecuteRequest,
    request: Request,
    response: Response,
    settings: SettingsDep,
    dispatcher: DispatcherDep,
    principal: PrincipalDep,
    prefer: Annotated[str | None, Header()] = None,
) -> StatusInfo:
    """Start a job (always asynchronous); the Location header names its status document."""
    _check_process(process_id)
    execution = Execution.of(
        outputs=body.outputs, response=body.response, subscriber=body.subscriber
    )
    spec = _job_spec(spec_inputs(body.inputs, data_roots=settings.data_roots))
    # relative paths resolve against the first data root (the server's folder without roots,
    # which only --insecure-local allows)
    job = job_spec.resolve_in_roots(spec, data_roots=settings.data_roots)
    record = dispatcher.submit(job, spec.model_dump(mode="json"), owner=principal.name)
    save_execution(settings.results_dir, record.job_id, execution)
    document = status_document(request, record)
    response.headers["Location"] = str(request.url_for("get_job", jobID=record.job_id))
    if prefer and "respond-async" in prefer:
        response.headers["Preference-Applied"] = "respond-async"
    return document


def _job_spec(inputs: dict[str, Any]) -> JobSpec:
    """The inputs validated as a job spec; errors name ``body.inputs.<field>`` (422)."""
    try:
        return JobSpec.model_validate(inputs)
    except ValidationError as exc:
        errors = [
            {**e, "loc": ("body", "inputs", *e["loc"])}
            for e in exc.errors(include_url=False, include_input=False)
        ]
        raise RequestValidationError(errors) from None
