"""The same job submitted several times at once through the REST service (TestClient, the
session's Dask cluster) gives the same summary.json apart from times and ids."""

from __future__ import annotations

import time
from collections.abc import Iterator
from contextlib import contextmanager
from typing import Any

from fastapi.testclient import TestClient

from demaudit.service.api.app import create_app
from demaudit.service.settings import Settings
from tests.integration.test_concurrent_jobs import COPIES, SPEC, assert_same_results
from tests.service.tokens import AUTH, PRINCIPALS


def test_identical_jobs_submitted_at_once_give_identical_summaries(
    make_archive, dask_client, tmp_path
):
    root = make_archive(tiles=3, pixels=40, noise=0.4, seed=8)

    @contextmanager
    def shared_cluster(settings: Settings) -> Iterator[Any]:
        yield dask_client

    settings = Settings(
        principals=PRINCIPALS,
        data_roots=(root,),
        results_dir=tmp_path / "results",
        job_store=tmp_path / "jobs.sqlite",
        max_running_jobs=COPIES,
        job_stall_timeout_s=None,
    )
    app = create_app(settings, client_factory=shared_cluster)
    with TestClient(app, headers=AUTH) as api:
        ids = []
        for _ in range(COPIES):
            response = api.post("/processes/dem-audit/execution", json={"inputs": SPEC})
            assert response.status_code == 201, response.text
            ids.append(response.json()["jobID"])
        deadline = time.monotonic() + 300
        while True:
            states = [api.get(f"/jobs/{i}").json()["status"] for i in ids]
            if all(s in ("successful", "failed", "dismissed") for s in states):
                break
            assert time.monotonic() < deadline, states
            time.sleep(0.2)
        messages = [api.get(f"/jobs/{i}").json().get("message") for i in ids]
        assert states == ["successful"] * COPIES, messages
        texts = [(settings.results_dir / i / "summary.json").read_text() for i in ids]

    assert_same_results(texts)
