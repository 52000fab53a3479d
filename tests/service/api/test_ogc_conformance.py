"""OGC API - Processes - Part 1: Core 1.0: the served documents against the standard's own JSON
schemas (vendored unmodified in tests/data/ogc with their licence; source named in its README.md),
and the behaviour its requirement classes ask for (OGC 18-062r2)."""

from __future__ import annotations

import datetime as dt
import functools
import json
from pathlib import Path
from typing import Any

import jsonschema
import pytest
import yaml
from referencing import Registry, Resource
from referencing.jsonschema import DRAFT4

from demaudit.service.store.jobs import JobRecord

SCHEMAS = Path(__file__).parents[2] / "data" / "ogc"
BASE = "https://schemas.invalid/ogcapi-processes-1/1.0/"
DEM_AUDIT = "/processes/dem-audit"


@functools.cache
def _registry() -> Registry:
    """Every schema file under its name (their $refs name files relative to each other)."""
    resources = []
    for path in sorted(SCHEMAS.glob("*.yaml")):
        contents = yaml.safe_load(path.read_text(encoding="utf-8"))
        resources.append((BASE + path.name, Resource(contents, specification=DRAFT4)))
    registry: Registry = Registry().with_resources(resources)
    return registry


def validate(document: Any, schema_file: str) -> None:
    """Validate document against one of the standard's schema files. The files are OpenAPI 3.0
    schema objects: Draft 4 semantics (boolean exclusiveMinimum; nullable not a keyword)."""
    validator = jsonschema.Draft4Validator({"$ref": BASE + schema_file}, registry=_registry())
    errors = sorted(validator.iter_errors(document), key=lambda e: list(e.absolute_path))
    assert not errors, "\n".join(
        f"{schema_file} at {'/'.join(map(str, e.absolute_path)) or '(root)'}: {e.message[:300]}"
        for e in errors
    )


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


# --- execute: input forms, outputs, response, subscriber ----------------------------------------

EXECUTE = DEM_AUDIT + "/execution"


def _execute(api, body: dict[str, Any]):
    return api.post(EXECUTE, json=body)


def test_qualified_values_are_taken(api, spec, runner, wait_for):
    inputs = {name: {"value": value} for name, value in spec.items()}
    inputs["reference"]["mediaType"] = "application/json"
    response = _execute(api, {"inputs": inputs})
    assert response.status_code == 201, response.text
    runner.gate.set()
    job_id = response.json()["jobID"]
    wait_for(api, job_id, lambda d: d["status"] == "successful")
    summary = api.get(f"/jobs/{job_id}/results").json()["summary"]["value"]
    assert summary["job"]["name"] == spec["name"]


@pytest.mark.parametrize("form", ["relative", "file-url", "yaml"])
def test_inputs_by_reference_to_a_file_in_the_data_roots(api, spec, data_root, form):
    if form == "yaml":
        (data_root / "test.yaml").write_text(yaml.safe_dump(spec["test"]))
        href = "test.yaml"
    else:
        (data_root / "test.json").write_text(json.dumps(spec["test"]))
        href = "test.json" if form == "relative" else (data_root / "test.json").as_uri()
    spec["test"] = {"href": href, "type": "application/json"}
    response = _execute(api, {"inputs": spec})
    assert response.status_code == 201, response.text


def test_a_reference_outside_the_data_roots_is_403(api, spec, data_root, tmp_path):
    (tmp_path / "outside.json").write_text(json.dumps(spec["test"]))
    for href in ("../outside.json", str(tmp_path / "outside.json")):
        spec["test"] = {"href": href}
        response = _execute(api, {"inputs": spec})
        assert response.status_code == 403, (href, response.text)
        detail = response.json()["detail"]
        assert detail.startswith("inputs.test.href:") and "outside" in detail


@pytest.mark.parametrize(
    "href", ["https://example.org/test.json", "http://127.0.0.1:9/x", "ftp://example.org/x"]
)
def test_remote_references_are_refused_not_fetched(api, spec, href):
    """The stub resolver of the api fixture would raise for 127.0.0.1 lookups only through
    webhooks; nothing here may open a connection: the refusal comes before any I/O."""
    spec["test"] = {"href": href}
    response = _execute(api, {"inputs": spec})
    assert response.status_code == 400, response.text
    body = response.json()
    assert body["type"] == "urn:demaudit:problem:not-supported"
    assert "inputs.test.href" in body["detail"] and "remote" in body["detail"]
    validate(body, "exception.yaml")


@pytest.mark.parametrize(
    ("content", "words"), [(None, "no readable file"), ("{not: [valid", "not a JSON or YAML")]
)
def test_an_unreadable_reference_is_422_naming_the_input(api, spec, data_root, content, words):
    if content is not None:
        (data_root / "bad.json").write_text(content)
    spec["test"] = {"href": "bad.json"}
    response = _execute(api, {"inputs": spec})
    assert response.status_code == 422, response.text
    assert response.json()["detail"].startswith("inputs.test.href:")
    assert words in response.json()["detail"]


def test_a_referenced_value_is_still_validated_as_the_spec(api, spec, data_root):
    (data_root / "test.json").write_text(json.dumps({"tiles": "test", "units": "furlong"}))
    spec["test"] = {"href": "test.json"}
    response = _execute(api, {"inputs": spec})
    assert response.status_code == 422
    assert any(e["field"] == "body.inputs.test.units" for e in response.json()["errors"])


def test_subscriber_is_refused_as_callbacks_are_not_offered(api, spec):
    body = {"inputs": spec, "subscriber": {"successUri": "https://example.org/done"}}
    response = _execute(api, body)
    assert response.status_code == 400
    assert "subscriber" in response.json()["detail"]
    conformance = api.get("/conformance").json()["conformsTo"]
    assert not any(c.endswith("/conf/callback") for c in conformance)


def test_unknown_outputs_are_refused(api, spec):
    response = _execute(api, {"inputs": spec, "outputs": {"pixels": {}}})
    assert response.status_code == 400
    assert response.json()["detail"].startswith("outputs.pixels:")
    wrong_media = {"summary": {"format": {"mediaType": "text/csv"}}}
    assert _execute(api, {"inputs": spec, "outputs": wrong_media}).status_code == 400
    for malformed in ({"summary": {"format": "json"}}, {"summary": []}, {"summary": {"x": 1}}):
        assert _execute(api, {"inputs": spec, "outputs": malformed}).status_code == 400
    by_value = {"results": {"transmissionMode": "value"}}
    assert _execute(api, {"inputs": spec, "outputs": by_value}).status_code == 400


def test_the_results_document_shows_the_outputs_asked_for(api, spec, runner, wait_for):
    response = _execute(api, {"inputs": spec, "outputs": {"results": {}}})
    assert response.status_code == 201, response.text
    job_id = response.json()["jobID"]
    runner.gate.set()
    wait_for(api, job_id, lambda d: d["status"] == "successful")
    results = api.get(f"/jobs/{job_id}/results").json()
    validate(results, "results.yaml")
    assert set(results) == {"results"}


def test_raw_response_gives_the_summary_itself(api, spec, runner, wait_for):
    refused = _execute(api, {"inputs": spec, "response": "raw"})
    assert refused.status_code == 400  # both outputs raw would need multipart (not offered)
    assert "raw" in refused.json()["detail"]
    response = _execute(api, {"inputs": spec, "response": "raw", "outputs": {"summary": {}}})
    assert response.status_code == 201, response.text
    job_id = response.json()["jobID"]
    runner.gate.set()
    wait_for(api, job_id, lambda d: d["status"] == "successful")
    raw = api.get(f"/jobs/{job_id}/results")
    assert raw.headers["content-type"] == "application/json"
    assert raw.json()["job"]["name"] == spec["name"]  # the document itself, not wrapped


def test_raw_response_of_results_is_a_link_header(api, spec, runner, wait_for):
    """OGC 18-062r2, /req/core/process-execute-sync-raw-ref: 204 and a Link header."""
    response = _execute(api, {"inputs": spec, "response": "raw", "outputs": {"results": {}}})
    assert response.status_code == 201, response.text
    job_id = response.json()["jobID"]
    runner.gate.set()
    wait_for(api, job_id, lambda d: d["status"] == "successful")
    raw = api.get(f"/jobs/{job_id}/results")
    assert raw.status_code == 204 and raw.content == b""
    assert raw.headers["link"].startswith(f"<http://testserver/jobs/{job_id}/results.zarr>;")


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


# --- the job list's parameters -----------------------------------------------------------------

T0 = dt.datetime(2026, 3, 1, 12, 0, tzinfo=dt.UTC)


def _record(job_id: str, *, created_h: float, ran_s: float | None) -> JobRecord:
    created = T0 + dt.timedelta(hours=created_h)
    started = None if ran_s is None else created + dt.timedelta(seconds=5)
    finished = None if started is None or ran_s is None else started + dt.timedelta(seconds=ran_s)
    return JobRecord(
        job_id=job_id,
        process_id="dem-audit",
        status="accepted" if ran_s is None else "successful",
        message="",
        created=created,
        updated=finished or created,
        started=started,
        finished=finished,
        owner="alice",
    )


@pytest.fixture
def listed(api, store):
    """Three jobs of alice: waiting (never started), 10 s and 100 s long, an hour apart."""
    for record in (
        _record("waiting", created_h=0, ran_s=None),
        _record("short", created_h=1, ran_s=10),
        _record("long", created_h=2, ran_s=100),
    ):
        store.add(record)
    return api


def _ids(api, **params: Any) -> set[str]:
    response = api.get("/jobs", params=params)
    assert response.status_code == 200, response.text
    validate(response.json(), "jobList.yaml")
    return {job["jobID"] for job in response.json()["jobs"]}


def test_the_job_list_leaves_out_waiting_jobs_unless_asked(listed):
    """OGC 18-062r2, /req/job-list/status-response: without a status parameter only running
    and finished jobs (successful, failed, dismissed) are listed; status=accepted lists the
    waiting ones."""
    assert _ids(listed) == {"short", "long"}
    assert _ids(listed, status="accepted") == {"waiting"}
    assert _ids(listed, status=["accepted", "successful"]) == {"waiting", "short", "long"}


def test_the_job_list_filters_by_type(listed):
    assert _ids(listed, type="process") == {"short", "long"}
    assert _ids(listed, type="other") == set()


def test_the_job_list_filters_by_duration(listed):
    """OGC 18-062r2, job-list duration: finished - started, seconds; a job that never started
    has no duration and is left out."""
    assert _ids(listed, minDuration=50) == {"long"}
    assert _ids(listed, maxDuration=50) == {"short"}
    assert _ids(listed, minDuration=10, maxDuration=100) == {"short", "long"}
    assert listed.get("/jobs", params={"minDuration": -1}).status_code == 400


def test_the_job_list_filters_by_creation_time(listed):
    """OGC 18-062r2, /req/job-list/datetime-response: the created time within the interval."""
    everything = {"status": ["accepted", "successful"]}
    assert _ids(listed, datetime="2026-03-01T13:00:00Z") == {"short"}
    assert _ids(listed, datetime="2026-03-01T12:30:00Z/..", **everything) == {"short", "long"}
    assert _ids(listed, datetime="../2026-03-01T13:00:00Z", **everything) == {"waiting", "short"}
    assert _ids(listed, datetime="2026-03-01T12:00:00Z/2026-03-01T13:00:00Z") == {"short"}
    for bad in ("yesterday", "2026-03-02T00:00:00Z/2026-03-01T00:00:00Z", "..", "a/b/c"):
        response = listed.get("/jobs", params={"datetime": bad})
        assert response.status_code == 400, bad
        assert "datetime" in response.json()["detail"]


def test_the_job_list_pages_filtered_results(listed):
    page = listed.get("/jobs", params={"minDuration": 0, "limit": 1}).json()
    assert page["numberMatched"] == 2 and page["numberReturned"] == 1
    assert [link["rel"] for link in page["links"]] == ["self", "next"]
    assert all(isinstance(link["title"], str) for link in page["links"])


@pytest.mark.parametrize("limit", [1, 1000, 10_000, 50_000])
def test_limit_up_to_ten_thousand_is_taken(listed, limit):
    """OGC 18-062r2, job-list: limit 1..10,000, default 10; a larger value counts as the
    maximum."""
    response = listed.get("/jobs", params={"limit": limit})
    assert response.status_code == 200
    assert response.json()["numberReturned"] == min(limit, 2)
    assert listed.get("/jobs", params={"limit": 0}).status_code == 400


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
