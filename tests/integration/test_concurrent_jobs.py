"""The same job run several times at once on one cluster gives the same summary.json, byte for
byte apart from times and ids (issue 17: std differed in the last bit between such runs)."""

from __future__ import annotations

import json
from concurrent.futures import ThreadPoolExecutor
from typing import Any

from demaudit.service.run.runner import run_job
from demaudit.workers import spec as job_spec

COPIES = 4
#: Members that name a run rather than describe its results (ids, clock times, durations).
RUN_ONLY = {"job_id", "jobID", "run_id", "started", "finished", "created", "timings_s"}


def _without_run_only(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _without_run_only(v) for k, v in value.items() if k not in RUN_ONLY}
    if isinstance(value, list):
        return [_without_run_only(v) for v in value]
    return value


SPEC = {
    "name": "same-job",
    "test": {"tiles": "test/*.tif", "vertical_crs": "ellipsoidal", "units": "metre"},
    "reference": {"tiles": "ref", "vertical_crs": "EPSG:5773", "units": "metre"},
    "region": {"file": "regions.geojson", "id_property": "code"},
}


def assert_same_results(texts: list[str]) -> None:
    documents = [_without_run_only(json.loads(t)) for t in texts]
    assert documents[0]["overall"]["count"] > 0
    first = json.dumps(documents[0], sort_keys=True)
    for other in documents[1:]:
        assert json.dumps(other, sort_keys=True) == first


def test_identical_jobs_run_at_once_on_one_cluster_give_identical_summaries(
    make_archive, dask_client, tmp_path
):
    # what the service's dispatcher does: one thread per job, one shared Dask client
    root = make_archive(tiles=3, pixels=40, noise=0.4, seed=8)
    job = job_spec.resolve_in_roots(job_spec.parse_spec(SPEC), data_roots=[root])

    def run(n: int) -> str:
        out = tmp_path / f"run{n}"
        run_job(job, out, client=dask_client, progress=None, run_id=f"run{n}")
        return (out / "summary.json").read_text()

    with ThreadPoolExecutor(COPIES) as pool:
        texts = list(pool.map(run, range(COPIES)))
    assert_same_results(texts)
