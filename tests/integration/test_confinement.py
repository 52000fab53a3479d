"""Files swapped for symlinks leading out of the data roots after a job was accepted are refused
when the job reads them (the whole chain on the session's Dask cluster)."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

from demaudit.service.run.runner import run_job
from demaudit.workers import spec as job_spec
from demaudit.workers.errors import DataRootError


def accept(root: Path) -> job_spec.ResolvedJob:
    """What the service does on POST /processes/dem-audit/execution (paths checked here)."""
    spec = job_spec.parse_spec(job_spec.load_spec_file(root / "job.yaml"))
    return job_spec.resolve_in_roots(spec, data_roots=[root])


def test_a_region_file_swapped_after_acceptance_is_refused(make_archive, dask_client, tmp_path):
    root = make_archive(tiles=2, pixels=20)
    job = accept(root)
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    shutil.copy(root / "regions.geojson", outside / "regions.geojson")
    (root / "regions.geojson").unlink()
    (root / "regions.geojson").symlink_to(outside / "regions.geojson")
    with pytest.raises(DataRootError) as refused:
        run_job(job, tmp_path / "out", client=dask_client, progress=None)
    message = str(refused.value)
    assert message == "region.file: regions.geojson leads outside the allowed data roots"
    assert not (tmp_path / "out" / "summary.json").exists()


def test_a_tile_swapped_after_acceptance_fails_alone_and_no_server_path_is_shown(
    make_archive, dask_client, tmp_path
):
    root = make_archive(tiles=2, pixels=20)
    job = accept(root)
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    swapped = root / "test" / "t_1_1.tif"
    shutil.copy(swapped, outside / "t_1_1.tif")
    swapped.unlink()
    swapped.symlink_to(outside / "t_1_1.tif")
    doc = run_job(job, tmp_path / "out", client=dask_client, progress=None)

    tiles = {t["tile"]: t for t in doc["tiles"]}
    assert tiles["t_1_1"]["status"] == "failed"
    assert "test/t_1_1.tif leads outside the allowed data roots" in tiles["t_1_1"]["reason"]
    assert sum(t["status"] == "ok" for t in tiles.values()) == 3
    text = (tmp_path / "out" / "summary.json").read_text()
    assert json.loads(text)["overall"]["count"] > 0
    for secret in (str(tmp_path), str(root), "/proc/"):
        assert secret not in text
