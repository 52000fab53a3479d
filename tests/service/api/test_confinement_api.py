"""Submission of specs with unusable paths, and links that never come from the Host header."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient

from demaudit.service.api.app import create_app
from demaudit.service.api.public_base import public_scope
from demaudit.service.settings import Settings
from demaudit.service.store.jobs import MemoryJobStore
from demaudit.workers.spec import MAX_GLOBS_PER_LIST
from tests.service.conftest import ScriptedRunner, fake_cluster, public_resolver
from tests.service.tokens import AUTH, PRINCIPALS

EXECUTE = "/processes/dem-audit/execution"


def _execute(api: TestClient, spec: dict[str, Any], **kwargs: Any) -> Any:
    return api.post(EXECUTE, json={"inputs": spec}, **kwargs)


@pytest.fixture
def app_with(tmp_path: Path, data_root: Path) -> Iterator[Any]:
    """app_with(public_base_url) -> a TestClient of an app with that setting."""
    clients: list[TestClient] = []

    def build(base: str | None) -> TestClient:
        settings = Settings(
            principals=PRINCIPALS,
            data_roots=(data_root,),
            results_dir=tmp_path / "results",
            job_store=tmp_path / "jobs.sqlite",
            public_base_url=base,
        )
        runner = ScriptedRunner()
        runner.gate.set()
        app = create_app(
            settings,
            store=MemoryJobStore(),
            runner=runner,
            client_factory=fake_cluster,
            webhook_resolver=public_resolver,
        )
        client = TestClient(app, headers=AUTH)
        client.__enter__()
        clients.append(client)
        return client

    yield build
    for client in clients:
        client.__exit__(None, None, None)


@pytest.mark.parametrize(
    ("tiles", "why"),
    [
        ("test/a\x00.tif", "control characters"),
        ("test/" + "a" * 5000 + ".tif", "5,009 characters"),
        ("~nosuchuser/a.tif", "no such user"),
        (["test/a.tif", "test/b\x00.tif"], "entry 1"),
        ([f"test/{i}*.tif" for i in range(MAX_GLOBS_PER_LIST + 1)], "glob patterns"),
    ],
    ids=["nul", "5000-chars", "unknown-user", "nul-in-list", "too-many-globs"],
)
def test_unusable_paths_are_422_naming_the_field(app_with, spec, tiles, why):
    # these gave 500 (NUL, long path, ~user) or a minute of CPU (globs) before
    api = app_with(None)  # the default body limit (1 MiB), not the 4 KiB of the api fixture
    spec["test"]["tiles"] = tiles
    response = _execute(api, spec)
    assert response.status_code == 422, response.text
    problem = response.json()
    assert "test.tiles" in problem["detail"]
    assert why in problem["detail"]


def test_a_long_region_file_name_is_422(app_with, spec):
    api = app_with(None)
    spec["region"] = {"file": "r" * 5000 + ".geojson"}
    response = _execute(api, spec)
    assert response.status_code == 422
    assert "region.file" in response.json()["detail"]


def test_a_name_component_too_long_for_the_os_is_422(api, spec):
    # 1000 characters pass the schema, but no file system takes a 300-character name
    spec["test"]["tiles"] = "test/" + "b" * 300 + ".tif"
    response = _execute(api, spec)
    assert response.status_code == 422, response.text
    assert "test.tiles" in response.json()["detail"]


def test_refusals_show_paths_relative_to_the_data_root(api, spec, data_root, tmp_path):
    outside = tmp_path / "secret"
    outside.mkdir()
    (outside / "x.tif").write_bytes(b"")
    (data_root / "test" / "link.tif").symlink_to(outside / "x.tif")
    response = _execute(api, spec)  # test/*.tif now holds a link leading out
    assert response.status_code == 403
    detail = response.json()["detail"]
    assert "test/link.tif" in detail
    assert str(tmp_path) not in detail and "secret" not in detail

    spec["test"]["tiles"] = "test/none/*.tif"
    detail = _execute(api, spec).json()["detail"]
    assert "test/none/*.tif" in detail and str(tmp_path) not in detail


EVIL = {"Host": "attacker.example", "X-Forwarded-Host": "attacker.example"}


def test_without_a_public_base_links_name_the_server_not_the_host_header(app_with, spec):
    api = app_with(None)
    response = _execute(api, spec, headers=EVIL)
    assert response.status_code == 201, response.text
    job_id = response.json()["jobID"]
    # TestClient's server address is ('testserver', 80): what the server answered on
    assert response.headers["Location"] == f"http://testserver/jobs/{job_id}"
    hrefs = [link["href"] for link in response.json()["links"]]
    hrefs += [link["href"] for link in api.get("/", headers=EVIL).json()["links"]]
    assert hrefs and all(h.startswith("http://testserver/") for h in hrefs), hrefs


def test_with_a_public_base_every_link_uses_it(app_with, spec):
    api = app_with("https://audit.example.org/api/")
    response = _execute(api, spec, headers=EVIL)
    assert response.status_code == 201, response.text
    job_id = response.json()["jobID"]
    assert response.headers["Location"] == f"https://audit.example.org/api/jobs/{job_id}"
    status = api.get(f"/jobs/{job_id}", headers=EVIL).json()
    hrefs = [link["href"] for link in status["links"]]
    assert hrefs and all(h.startswith("https://audit.example.org/api/") for h in hrefs), hrefs


def test_public_scope_drops_the_callers_host():
    scope = {
        "type": "http",
        "scheme": "http",
        "server": ("10.0.0.5", 8000),
        "root_path": "",
        "headers": [(b"host", b"attacker.example"), (b"accept", b"*/*")],
    }
    own = public_scope(scope, None)
    assert own["server"] == ("10.0.0.5", 8000)
    assert own["headers"] == [(b"accept", b"*/*")]
    based = public_scope(scope, "https://audit.example.org:8443/api")
    assert (b"host", b"audit.example.org:8443") in based["headers"]
    assert (b"host", b"attacker.example") not in based["headers"]
    assert based["scheme"] == "https" and based["app_root_path"] == "/api"
    assert scope["headers"][0] == (b"host", b"attacker.example")  # the original is untouched
