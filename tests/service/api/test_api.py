"""The REST API on a TestClient: OGC documents, problems, security, the job lifecycle."""

from __future__ import annotations

import json
import os
import time

import pytest
from fastapi.testclient import TestClient

from demaudit.service.api.app import create_app
from demaudit.service.run.faults import INTERNAL_FAILURE
from demaudit.service.store.jobs import MemoryJobStore
from demaudit.service.store.sqlite_jobs import SqliteJobStore
from demaudit.workers.errors import TileReadError
from tests.service.tokens import AUTH, AUTH_ADMIN, TOKEN, UNKNOWN_TOKEN

OGC = "http://www.opengis.net/def/exceptions/ogcapi-processes-1/1.0/"
EXECUTE = "/processes/dem-audit/execution"


def assert_problem(response, status: int, type_: str | None = None) -> dict:
    assert response.status_code == status, response.text
    assert response.headers["content-type"].startswith("application/problem+json")
    body = response.json()
    assert {"type", "title", "status", "detail"} <= body.keys()
    assert body["status"] == status
    if type_ is not None:
        assert body["type"] == type_
    return body


# --- OGC documents -----------------------------------------------------------------------------


def test_landing_page_links_the_api_parts(api):
    links = {link["rel"]: link["href"] for link in api.get("/").json()["links"]}
    assert links["service-desc"].endswith("/openapi.json")
    assert links["http://www.opengis.net/def/rel/ogc/1.0/processes"].endswith("/processes")
    assert links["http://www.opengis.net/def/rel/ogc/1.0/job-list"].endswith("/jobs")


def test_conformance_declares_core_job_list_and_dismiss(api):
    conforms = api.get("/conformance").json()["conformsTo"]
    base = "http://www.opengis.net/spec/ogcapi-processes-1/1.0/conf/"
    assert {base + "core", base + "job-list", base + "dismiss"} <= set(conforms)


def test_the_one_process_is_described_with_the_spec_as_inputs(api):
    listed = api.get("/processes").json()["processes"]
    assert [p["id"] for p in listed] == ["dem-audit"]
    described = api.get("/processes/dem-audit").json()
    assert described["jobControlOptions"] == ["async-execute", "dismiss"]
    inputs = described["inputs"]
    assert inputs["test"]["minOccurs"] == 1 and inputs["region"]["minOccurs"] == 0
    assert inputs["name"]["minOccurs"] == 1
    assert "tiles" in inputs["test"]["schema"]["properties"]  # $refs are inlined
    assert set(described["outputs"]) == {"summary", "results"}


def test_unknown_process_is_the_standards_problem(api):
    assert_problem(api.get("/processes/nope"), 404, OGC + "no-such-process")
    assert_problem(
        api.post(
            "/processes/nope/execution",
            json={
                "inputs": {"name": "x", "test": {"tiles": "test"}, "reference": {"tiles": "ref"}}
            },
        ),
        404,
        OGC + "no-such-process",
    )


# --- security -----------------------------------------------------------------------------------


@pytest.mark.parametrize("path", ["/", "/processes", "/jobs", "/jobs/abc", "/metrics"])
@pytest.mark.parametrize(
    "auth", [None, f"Bearer {UNKNOWN_TOKEN}", f"Bearer {TOKEN[:-1]}", "Basic dXNlcjpwYXNz"]
)
def test_requests_without_a_valid_token_get_401(api, path, auth):
    headers = {"Authorization": auth} if auth else {}
    response = api.get(path, headers=headers) if auth else _anonymous(api).get(path)
    body = assert_problem(response, 401)
    assert response.headers["www-authenticate"].startswith("Bearer")
    assert UNKNOWN_TOKEN not in body["detail"]


def _anonymous(api: TestClient) -> TestClient:
    api.headers.pop("Authorization", None)
    return api


def test_health_needs_no_token_and_counts_workers(api):
    body = _anonymous(api).get("/health").json()
    assert body["status"] == "pass"
    assert body["cluster"] == {"ready": True, "workers": 2}


@pytest.mark.parametrize(
    "tiles",
    ["../outside/*.tif", "/etc/*.conf", "test/../../outside"],
)
def test_paths_outside_the_data_roots_are_403(api, spec, data_root, tiles):
    (data_root.parent / "outside").mkdir(exist_ok=True)
    (data_root.parent / "outside" / "x.tif").write_bytes(b"secret")
    spec["test"]["tiles"] = tiles
    body = assert_problem(api.post(EXECUTE, json={"inputs": spec}), 403)
    assert "test.tiles" in body["detail"] and "secret" not in body["detail"]


def test_a_symlink_out_of_the_data_roots_is_403(api, spec, data_root):
    outside = data_root.parent / "elsewhere"
    outside.mkdir()
    (outside / "x.tif").write_bytes(b"")
    os.symlink(outside, data_root / "link")
    spec["reference"]["tiles"] = "link/*.tif"
    body = assert_problem(api.post(EXECUTE, json={"inputs": spec}), 403)
    assert "reference.tiles" in body["detail"]


def test_a_tile_symlinked_out_of_the_data_roots_is_403(api, spec, data_root):
    outside = data_root.parent / "private.tif"
    outside.write_bytes(b"not for you")
    os.symlink(outside, data_root / "test" / "innocent.tif")
    body = assert_problem(api.post(EXECUTE, json={"inputs": spec}), 403)
    assert "test.tiles" in body["detail"] and "not for you" not in body["detail"]


def test_bodies_over_the_limit_are_413(api, spec):
    spec["name"] = "x" * 5000
    assert_problem(api.post(EXECUTE, json={"inputs": spec}), 413)


def test_chunked_bodies_over_the_limit_are_413(api):
    def chunks():
        yield b'{"inputs": {"name": "'
        for _ in range(10):
            yield b"x" * 1000
        yield b'"}}'

    response = api.post(EXECUTE, content=chunks(), headers={"Content-Type": "application/json"})
    assert_problem(response, 413)


# --- validation --------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("change", "field"),
    [
        ({"test": None}, "body.inputs.test"),
        ({"colour": "red"}, "body.inputs.colour"),
        ({"test": {"tiles": "test", "units": "furlong"}}, "body.inputs.test.units"),
        ({"test": {"tiles": "test", "vertical_crs": "EPSG:4326"}}, "body.inputs.test.vertical_crs"),
        ({"name": "no spaces allowed"}, "body.inputs.name"),
    ],
)
def test_invalid_specs_are_422_naming_the_field(api, spec, change, field):
    spec.update(change)
    spec = {k: v for k, v in spec.items() if v is not None}
    body = assert_problem(api.post(EXECUTE, json={"inputs": spec}), 422)
    assert field in body["detail"]
    assert any(e["field"] == field for e in body["errors"])


def test_a_missing_file_is_422_naming_the_field(api, spec):
    spec["test"]["tiles"] = "nothing/*.tif"
    body = assert_problem(api.post(EXECUTE, json={"inputs": spec}), 422)
    assert body["detail"].startswith("test.tiles:")


def test_malformed_json_is_400(api):
    response = api.post(EXECUTE, content=b"{not json", headers={"Content-Type": "application/json"})
    assert_problem(response, 400)


def test_submitted_values_are_not_echoed(api, spec):
    spec["test"]["units"] = "SECRET-VALUE"
    body = assert_problem(api.post(EXECUTE, json={"inputs": spec}), 422)
    assert "SECRET-VALUE" not in str(body)


@pytest.mark.parametrize(
    "query", ["limit=0", "limit=abc", "offset=-1", "status=sleeping", f"offset={10**30}"]
)
def test_bad_query_parameters_are_400(api, query):
    assert_problem(api.get(f"/jobs?{query}"), 400)


# --- the job lifecycle -------------------------------------------------------------------------


def test_execution_is_asynchronous_with_location(api, spec):
    response = api.post(EXECUTE, json={"inputs": spec}, headers={"Prefer": "respond-async"})
    assert response.status_code == 201
    body = response.json()
    assert response.headers["location"].endswith(f"/jobs/{body['jobID']}")
    assert response.headers["preference-applied"] == "respond-async"
    assert body["type"] == "process" and body["processID"] == "dem-audit"
    assert body["status"] in {"accepted", "running"}


def test_a_job_runs_to_success_with_progress_and_results(api, runner, submit, wait_for):
    job_id = submit(api)
    running = wait_for(api, job_id, lambda d: d["status"] == "running" and d["progress"] == 25)
    assert running["tiles"] == {"done": 1, "total": 4}
    assert_problem(api.get(f"/jobs/{job_id}/results"), 404, OGC + "result-not-ready")
    assert_problem(api.get(f"/jobs/{job_id}/tiles/t1"), 404, OGC + "result-not-ready")
    runner.gate.set()
    done = wait_for(api, job_id, lambda d: d["status"] == "successful")
    assert done["progress"] == 100
    assert done["started"] and done["finished"] and done["created"] <= done["updated"]
    assert any(link["rel"].endswith("/results") for link in done["links"])

    results = api.get(f"/jobs/{job_id}/results").json()
    assert results["summary"]["value"]["job"]["name"] == "unit-job"
    assert results["results"]["href"].endswith(f"/jobs/{job_id}/results.zarr")
    assert api.get(f"/jobs/{job_id}/tiles/t2").json()["stats"] == {"count": 2}
    assert api.get(f"/jobs/{job_id}/regions/EAST").json()["name"] == "East"
    assert api.get(f"/jobs/{job_id}/results.zarr/zarr.json").json() == {"zarr_format": 3}
    assert_problem(api.get(f"/jobs/{job_id}/tiles/t9"), 404)
    assert_problem(api.get(f"/jobs/{job_id}/regions/WEST"), 404)
    assert_problem(api.get(f"/jobs/{job_id}/results.zarr/../summary.json"), 404)
    assert_problem(api.get(f"/jobs/{job_id}/results.zarr/%2e%2e/summary.json"), 404)


@pytest.mark.parametrize("path", ["", "/results", "/tiles/t1", "/regions/EAST"])
def test_unknown_jobs_are_the_standards_problem(api, path):
    assert_problem(
        api.get(f"/jobs/0123456789abcdef0123456789abcdef{path}"), 404, OGC + "no-such-job"
    )


def test_dismissing_a_running_job_stops_it_and_removes_its_outputs(
    api, runner, settings, submit, wait_for
):
    job_id = submit(api)
    wait_for(api, job_id, lambda d: d["status"] == "running")
    response = api.delete(f"/jobs/{job_id}")
    assert response.status_code == 200 and response.json()["status"] == "dismissed"
    ended = wait_for(api, job_id, lambda d: "cancelled" in d["message"])
    assert ended["status"] == "dismissed" and ended["tiles"]["done"] == 1
    assert runner.stopped == [job_id]
    assert not (settings.results_dir / job_id).exists()
    assert_problem(api.get(f"/jobs/{job_id}/results"), 410)
    assert api.delete(f"/jobs/{job_id}").json()["status"] == "dismissed"  # idempotent


def test_a_waiting_job_dismissed_never_runs(api, runner, submit, wait_for):
    first, second = submit(api), submit(api)  # max_running_jobs = 2
    third = submit(api)
    wait_for(api, second, lambda d: d["status"] == "running")
    assert api.get(f"/jobs/{third}").json()["status"] == "accepted"
    assert api.delete(f"/jobs/{third}").json()["status"] == "dismissed"
    runner.gate.set()
    wait_for(api, first, lambda d: d["status"] == "successful")
    wait_for(api, second, lambda d: d["status"] == "successful")
    assert third not in runner.started
    assert api.get(f"/jobs/{third}").json()["status"] == "dismissed"


def test_dismissing_a_finished_job_drops_its_results(api, runner, settings, submit, wait_for):
    runner.gate.set()
    job_id = submit(api)
    wait_for(api, job_id, lambda d: d["status"] == "successful")
    assert api.delete(f"/jobs/{job_id}").json()["status"] == "dismissed"
    assert not (settings.results_dir / job_id).exists()


def test_a_job_with_bad_data_fails_with_the_reason(api, runner, settings, submit, wait_for):
    runner.fail = TileReadError("no test tile could be read: a.tif: not a raster")
    runner.gate.set()
    job_id = submit(api)
    failed = wait_for(api, job_id, lambda d: d["status"] == "failed")
    assert failed["message"] == "no test tile could be read: a.tif: not a raster"
    problem = api.get(f"/jobs/{job_id}/results")
    assert_problem(problem, 409)
    # the status document carries the cause the results problem gives
    assert failed["cause"] == problem.json()["cause"]
    assert failed["cause"]["type"].endswith("tile-unreadable") and failed["cause"]["status"] == 422
    assert not (settings.results_dir / job_id).exists()


def test_a_crash_fails_the_job_without_leaking_its_text(api, runner, submit, wait_for):
    runner.fail = RuntimeError("root:x:0:0:root:/root:/bin/bash")
    runner.gate.set()
    job_id = submit(api)
    failed = wait_for(api, job_id, lambda d: d["status"] == "failed")
    assert failed["message"] == INTERNAL_FAILURE
    assert failed["cause"]["type"].endswith("internal") and failed["cause"]["status"] == 500
    assert "root:x" not in json.dumps(failed)


def test_jobs_are_listed_newest_first_filtered_and_paged(api, runner, submit, wait_for):
    runner.gate.set()
    ids = [submit(api) for _ in range(5)]
    for job_id in ids:
        wait_for(api, job_id, lambda d: d["status"] == "successful")
    api.delete(f"/jobs/{ids[0]}")
    page = api.get("/jobs", params={"limit": 2}).json()
    assert [j["jobID"] for j in page["jobs"]] == ids[::-1][:2]
    assert page["numberMatched"] == 5
    seen = []
    url: str | None = "/jobs?limit=2&status=successful"
    while url:
        page = api.get(url).json()
        seen += [j["jobID"] for j in page["jobs"]]
        url = next((link["href"] for link in page["links"] if link["rel"] == "next"), None)
    assert seen == ids[1:][::-1]
    dismissed = api.get("/jobs", params={"status": "dismissed"}).json()["jobs"]
    assert [j["jobID"] for j in dismissed] == [ids[0]]
    assert api.get("/jobs", params={"processID": "other"}).json()["jobs"] == []


def test_metrics_count_jobs_tiles_and_queue(api, runner, submit, wait_for):
    runner.gate.set()
    job_id = submit(api)
    wait_for(api, job_id, lambda d: d["status"] == "successful")
    text = api.get("/metrics").text
    assert 'demaudit_jobs{status="successful"} 1.0' in text
    assert "demaudit_tiles_done_total 4.0" in text
    assert "demaudit_queue_length 0.0" in text
    assert "demaudit_cluster_workers 2.0" in text


def test_restart_fails_jobs_left_unfinished(settings, runner, cluster_factory):
    from demaudit.service.run.faults import RESTART_MESSAGE, RESTART_QUEUED_MESSAGE
    from demaudit.service.store.jobs import JobRecord, utc_now

    left = SqliteJobStore(settings.job_store)  # what a killed server left behind
    now = utc_now()
    for job_id, status in [("a" * 32, "running"), ("b" * 32, "accepted"), ("c" * 32, "failed")]:
        left.add(JobRecord(job_id, "dem-audit", status, "...", now, now))
    left.close()

    app = create_app(settings, runner=runner, client_factory=cluster_factory)
    with TestClient(app, headers=AUTH_ADMIN) as api:  # jobs from before owners: admins only
        running = api.get("/jobs/" + "a" * 32).json()
        queued = api.get("/jobs/" + "b" * 32).json()
        finished = api.get("/jobs/" + "c" * 32).json()
    assert (running["status"], running["message"]) == ("failed", RESTART_MESSAGE)
    assert (queued["status"], queued["message"]) == ("failed", RESTART_QUEUED_MESSAGE)
    assert running["finished"] is not None
    assert finished["message"] == "..."


def test_the_sqlite_store_keeps_jobs_across_app_restarts(settings, runner, cluster_factory):
    runner.gate.set()
    headers = AUTH
    with TestClient(
        create_app(settings, runner=runner, client_factory=cluster_factory), headers=headers
    ) as api:
        job_id = api.post(EXECUTE, json={"inputs": _spec()}).json()["jobID"]
        for _ in range(500):
            if api.get(f"/jobs/{job_id}").json()["status"] == "successful":
                break
            time.sleep(0.01)
    with TestClient(
        create_app(settings, runner=runner, client_factory=cluster_factory), headers=headers
    ) as api:
        assert api.get(f"/jobs/{job_id}").json()["status"] == "successful"
        results = api.get(f"/jobs/{job_id}/results").json()
        assert results["summary"]["value"]["job"]["name"] == "unit-job"


def _spec() -> dict:
    return {"name": "unit-job", "test": {"tiles": "test"}, "reference": {"tiles": "ref"}}


def test_the_app_refuses_to_start_without_principals(settings):
    with pytest.raises(ValueError, match="DEMAUDIT_PRINCIPALS"):
        create_app(settings.model_copy(update={"principals": ()}), store=MemoryJobStore())
