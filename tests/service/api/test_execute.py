"""OGC API - Processes 1.0 execute requests (OGC 18-062r2, execute.yaml): input forms (inline,
qualified, by reference inside the data roots), outputs, response, subscriber; the results
documents they give."""

from __future__ import annotations

import json
from typing import Any

import pytest
import yaml

from tests.support.ogc import DEM_AUDIT, validate

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
