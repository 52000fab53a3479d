"""OGC API - Processes - Part 1: Core 1.0: the served documents against the standard's own JSON
schemas (vendored unmodified in tests/data/ogc with their licence; source named in its README.md),
and the behaviour its requirement classes ask for (OGC 18-062r2)."""

from __future__ import annotations

import datetime as dt
import json
from typing import Any

import pytest

from demaudit.service.store.jobs import JobRecord
from tests.support.ogc import DEM_AUDIT, validate


def test_the_validator_refuses_what_the_issue_found():
    """The checker itself: a null started and a JSON-Schema-2020 input schema are refused."""
    status = {"jobID": "j", "status": "running", "type": "process", "started": None}
    with pytest.raises(AssertionError, match="started"):
        validate(status, "statusInfo.yaml")
    with pytest.raises(AssertionError):
        validate({"anyOf": [{"type": "string"}, {"type": "null"}]}, "schema.yaml")
    with pytest.raises(AssertionError):
        validate({"type": "number", "exclusiveMinimum": 0}, "schema.yaml")


# --- the documents -----------------------------------------------------------------------------


def test_landing_page_and_conformance(api):
    validate(api.get("/").json(), "landingPage.yaml")
    validate(api.get("/conformance").json(), "confClasses.yaml")


def test_process_list_and_description(api):
    validate(api.get("/processes").json(), "processList.yaml")
    description = api.get(DEM_AUDIT).json()
    validate(description, "process.yaml")
    assert description["inputs"], "no inputs described"
    for name, entry in description["inputs"].items():
        validate(entry["schema"], "schema.yaml")
        validate(entry, "inputDescription.yaml")
        assert name
    for entry in description["outputs"].values():
        validate(entry, "outputDescription.yaml")


def _finished(api, runner, submit, wait_for) -> str:
    job_id = submit(api)
    runner.gate.set()
    wait_for(api, job_id, lambda d: d["status"] == "successful")
    return job_id


def test_status_documents_in_every_state(api, runner, submit, wait_for):
    """accepted/running (started but unfinished: no nulls), successful."""
    job_id = submit(api)
    running = wait_for(api, job_id, lambda d: d["status"] == "running")
    validate(running, "statusInfo.yaml")
    assert "finished" not in running
    runner.gate.set()
    done = wait_for(api, job_id, lambda d: d["status"] == "successful")
    validate(done, "statusInfo.yaml")
    assert {"started", "finished", "created", "updated"} <= set(done)


def test_an_accepted_job_has_no_started_member(api, store):
    now = dt.datetime.now(dt.UTC)
    store.add(
        JobRecord(
            job_id="waiting",
            process_id="dem-audit",
            status="accepted",
            message="accepted",
            created=now,
            updated=now,
            owner="alice",
        )
    )
    document = api.get("/jobs/waiting").json()
    validate(document, "statusInfo.yaml")
    assert "started" not in document and "finished" not in document


def _failed(store, job_id: str, message: str, cause: str | None) -> None:
    now = dt.datetime.now(dt.UTC)
    record = JobRecord(
        job_id, "dem-audit", "failed", message, now, now, finished=now, owner="alice", cause=cause
    )
    store.add(record)


def test_a_failed_job_says_why_in_its_status_document(api, store):
    """statusInfo's message (a string) carries the reason; cause is an extension member (the
    schema allows them) with the type, title and status of the results' 409 problem's cause."""
    _failed(store, "bad-input", "test_tiles: no file matches 'x/*.tif'", "invalid-input")
    _failed(store, "no-reason", "", None)  # a record without message or cause
    bad = api.get("/jobs/bad-input").json()
    validate(bad, "statusInfo.yaml")
    assert bad["message"] == "test_tiles: no file matches 'x/*.tif'"
    assert bad["cause"] == api.get("/jobs/bad-input/results").json()["cause"]
    assert bad["cause"]["type"].endswith("invalid-input") and bad["cause"]["status"] == 422
    bare = api.get("/jobs/no-reason").json()
    validate(bare, "statusInfo.yaml")
    assert bare["message"] == bare["cause"]["title"] == "Internal error"
    validate(api.get("/jobs").json(), "jobList.yaml")


def test_only_failed_jobs_have_a_cause(api, runner, submit, wait_for):
    job_id = submit(api)
    assert "cause" not in wait_for(api, job_id, lambda d: d["status"] == "running")
    runner.gate.set()
    assert "cause" not in wait_for(api, job_id, lambda d: d["status"] == "successful")


def test_job_list(api, runner, submit, wait_for):
    _finished(api, runner, submit, wait_for)
    submit(api)
    listing = api.get("/jobs").json()
    validate(listing, "jobList.yaml")
    assert listing["jobs"]
    for link in listing["links"]:
        assert link.get("title", "") is not None


def test_results_document(api, runner, submit, wait_for):
    job_id = _finished(api, runner, submit, wait_for)
    results = api.get(f"/jobs/{job_id}/results").json()
    validate(results, "results.yaml")
    assert results["summary"]["value"]["overall"]["count"] == 10  # the scripted runner's
    assert results["summary"]["mediaType"] == "application/json"
    assert results["results"]["href"].endswith(f"/jobs/{job_id}/results.zarr")


def test_one_output_of_a_job(api, runner, submit, wait_for):
    job_id = _finished(api, runner, submit, wait_for)
    summary = api.get(f"/jobs/{job_id}/results/summary")
    assert summary.status_code == 200
    assert summary.json() == api.get(f"/jobs/{job_id}/results").json()["summary"]["value"]
    results = api.get(f"/jobs/{job_id}/results/results")
    assert results.status_code == 204
    assert results.headers["link"].startswith(f"<http://testserver/jobs/{job_id}/results.zarr>")
    missing = api.get(f"/jobs/{job_id}/results/pixels")
    assert missing.status_code == 404
    validate(missing.json(), "exception.yaml")
    api.delete(f"/jobs/{job_id}")
    assert api.get(f"/jobs/{job_id}/results/summary").status_code == 410  # dismissed


def test_problem_documents(api):
    validate(api.get("/jobs/nope").json(), "exception.yaml")
    validate(api.get("/processes/nope").json(), "exception.yaml")
    validate(api.get("/", headers={"Accept": "application/xml"}).json(), "exception.yaml")


# --- OpenAPI 3.0 as announced ------------------------------------------------------------------


def _schemas_in(node: Any, path: str = "") -> list[tuple[str, Any]]:
    found: list[tuple[str, Any]] = []
    if isinstance(node, dict):
        for key, value in node.items():
            if key == "schema":
                found.append((f"{path}/{key}", value))
            else:
                found.extend(_schemas_in(value, f"{path}/{key}"))
    elif isinstance(node, list):
        for i, value in enumerate(node):
            found.extend(_schemas_in(value, f"{path}/{i}"))
    return found


def _inlined(schema: Any, components: dict[str, Any], depth: int = 0) -> Any:
    """schema with every #/components/schemas/ reference replaced by its target."""
    assert depth < 20, "recursive schema"
    if isinstance(schema, dict):
        ref = schema.get("$ref")
        if isinstance(ref, str) and ref.startswith("#/components/schemas/"):
            target = components[ref.removeprefix("#/components/schemas/")]
            return _inlined(target, components, depth + 1)
        return {k: _inlined(v, components, depth) for k, v in schema.items()}
    if isinstance(schema, list):
        return [_inlined(v, components, depth) for v in schema]
    return schema


def test_openapi_is_served_as_the_30_it_announces(api):
    landing = api.get("/").json()
    (desc,) = [link for link in landing["links"] if link["rel"] == "service-desc"]
    assert desc["type"] == "application/vnd.oai.openapi+json;version=3.0"
    response = api.get(desc["href"], headers={"Accept": desc["type"]})
    assert response.status_code == 200
    assert response.headers["content-type"].startswith(desc["type"])
    document = response.json()
    assert document["openapi"].startswith("3.0.")
    assert "summary" not in document["info"]  # an OpenAPI 3.1 member
    # every schema object is one the standard's schema.yaml (OpenAPI 3.0's subset) accepts;
    # references inlined first: schema.yaml offers a nested {"$ref"} both as schema.yaml (itself
    # oneOf reference | schema) and as reference.yaml, so oneOf refuses any nested reference
    components = document["components"]["schemas"]
    for name, schema in components.items():
        try:
            validate(_inlined(schema, components), "schema.yaml")
        except AssertionError as exc:
            raise AssertionError(name) from exc
    for where, schema in _schemas_in(document["paths"]):
        try:
            validate(_inlined(schema, components), "schema.yaml")
        except AssertionError as exc:
            raise AssertionError(where) from exc
    as_json = api.get(desc["href"], headers={"Accept": "application/json"})
    assert as_json.headers["content-type"].startswith("application/json")
    assert as_json.json() == document
    assert api.get(desc["href"], headers={"Accept": "text/csv"}).status_code == 406


# --- HEAD and 406 ------------------------------------------------------------------------------


def _get_paths(api, job_id: str) -> list[str]:
    return [
        "/",
        "/conformance",
        "/openapi.json",
        "/processes",
        DEM_AUDIT,
        "/jobs",
        f"/jobs/{job_id}",
        f"/jobs/{job_id}/results",
        f"/jobs/{job_id}/results/summary",
        f"/jobs/{job_id}/tiles/t1",
        f"/jobs/{job_id}/regions/EAST",
        f"/jobs/{job_id}/results.zarr/zarr.json",
        "/schedules",
        "/health/live",
    ]


def test_every_get_resource_answers_head(api, runner, submit, wait_for):
    job_id = _finished(api, runner, submit, wait_for)
    for path in _get_paths(api, job_id):
        got = api.get(path)
        head = api.head(path)
        assert got.status_code == 200, (path, got.text)
        assert head.status_code == 200, path
        assert head.content == b"", path
        assert head.headers["content-type"] == got.headers["content-type"], path


@pytest.mark.parametrize("accept", ["application/xml", "image/png", "text/csv;q=1, */*;q=0"])
def test_unsupported_media_types_are_406(api, runner, submit, wait_for, accept):
    job_id = _finished(api, runner, submit, wait_for)
    for path in _get_paths(api, job_id):
        if path.startswith("/health") or "results.zarr" in path:
            continue  # health and metrics: plain text; results.zarr: files of several types
        response = api.get(path, headers={"Accept": accept})
        assert response.status_code == 406, (path, response.status_code)
        assert response.headers["content-type"] == "application/problem+json"


def test_json_is_the_default_and_wildcards_get_it(api):
    for accept in (None, "*/*", "application/*", "application/json;q=0.5, text/csv;q=0.9"):
        headers = {} if accept is None else {"Accept": accept}
        response = api.get("/processes", headers=headers)
        assert response.status_code == 200, accept
        assert response.headers["content-type"] == "application/json", accept


# --- the pieces: media type choice, OpenAPI 3.0 schema rewriting -------------------------------

J, H = "application/json", "text/html"
OAS30 = "application/vnd.oai.openapi+json;version=3.0"


@pytest.mark.parametrize(
    ("accept", "offered", "chosen"),
    [
        (None, (J, H), J),  # no header: the first offered
        ("", (J, H), J),
        ("*/*", (J, H), J),  # a tie goes to the first offered
        ("text/html,application/xhtml+xml,application/xml;q=0.9,*/*;q=0.8", (J, H), H),  # browser
        ("application/json;q=0.5, text/html;q=0.6", (J, H), H),
        ("application/json;q=0.5, text/html;q=0.6", (J,), J),
        ("text/*", (J, H), H),
        ("application/xml", (J, H), None),
        ("*/*;q=0", (J,), None),
        ("application/json;q=0, */*", (J, H), H),  # the more specific range rules JSON out
        (OAS30, (OAS30, J), OAS30),
        (OAS30.replace("3.0", "3.1"), (OAS30,), None),  # parameters must agree
    ],
)
def test_choose_follows_the_accept_header(accept, offered, chosen):
    """RFC 9110 section 12.5.1: quality values, wildcards, the most specific range wins."""
    from demaudit.service.api.negotiation import choose

    assert choose(accept, offered) == chosen


@pytest.mark.parametrize(
    ("json_schema", "oas30"),
    [
        (
            {"anyOf": [{"type": "string"}, {"type": "null"}], "default": None},
            {"type": "string", "nullable": True, "default": None},
        ),
        ({"type": ["integer", "null"]}, {"type": "integer", "nullable": True}),
        (
            {"type": "number", "exclusiveMinimum": 0},
            {"type": "number", "minimum": 0, "exclusiveMinimum": True},
        ),
        (
            {"type": "number", "exclusiveMaximum": 1},
            {"type": "number", "maximum": 1, "exclusiveMaximum": True},
        ),
        ({"const": "nmad"}, {"enum": ["nmad"]}),
        (
            {
                "type": "object",
                "propertyNames": {"pattern": "^[0-9]+$"},
                "additionalProperties": {"type": "string"},
            },
            {"type": "object", "additionalProperties": {"type": "string"}},
        ),
        ({"examples": [3]}, {"example": 3}),
        (
            {"$ref": "#/components/schemas/A", "description": "d"},
            {"allOf": [{"$ref": "#/components/schemas/A"}], "description": "d"},
        ),
        (
            {"anyOf": [{"$ref": "#/components/schemas/A"}, {"type": "null"}]},
            {"allOf": [{"$ref": "#/components/schemas/A"}], "nullable": True},
        ),
        (
            {"type": "array", "prefixItems": [{"type": "number"}, {"type": "number"}]},
            {
                "type": "array",
                "items": {"anyOf": [{"type": "number"}, {"type": "number"}]},
                "minItems": 2,
                "maxItems": 2,
            },
        ),
    ],
)
def test_json_schema_becomes_an_openapi_30_schema_object(json_schema, oas30):
    """OpenAPI 3.0.3 section 4.7.24 (Schema Object) against JSON Schema 2020-12."""
    from demaudit.service.api.openapi import oas30_schema

    assert oas30_schema(json_schema) == oas30
    if "$ref" not in json.dumps(oas30):  # schema.yaml refuses nested references (see above)
        validate(oas30, "schema.yaml")
