"""A tile that hangs on a live worker: the job ends with that tile failed for the time limit,
the other tiles computed and the statistics without it (real LocalCluster, run_job)."""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

from demaudit.service.run import tiles as tile_phase
from demaudit.service.run.runner import run_job
from demaudit.service.run.tile_limit import timeout_reason
from demaudit.workers import spec as job_spec
from demaudit.workers.tile.task import audit_and_store

HUNG = "t_1_0"
LIMIT_S = 5.0


def test_a_hung_tile_is_cancelled_and_the_job_goes_on(
    make_archive, dask_client, tmp_path, monkeypatch
):
    def hangs_on_one_tile(tile: Any, *args: Any, **kwargs: Any) -> Any:
        if tile.tile_id == HUNG:
            time.sleep(600)  # as GDAL blocked on a hung network mount
        return audit_and_store(tile, *args, **kwargs)

    monkeypatch.setattr(tile_phase, "audit_and_store", hangs_on_one_tile)
    root = make_archive(tiles=2, pixels=40)
    spec = job_spec.parse_spec(job_spec.load_spec_file(root / "job.yaml"))
    job = job_spec.resolve(spec, base_dir=root)
    doc = run_job(job, tmp_path / "out", client=dask_client, tile_timeout_s=LIMIT_S)

    tiles = {t["tile"]: t for t in doc["tiles"]}
    assert tiles[HUNG]["status"] == "failed"
    assert tiles[HUNG]["reason"] == timeout_reason(HUNG, LIMIT_S)
    others = [tiles[t] for t in ("t_0_0", "t_0_1", "t_1_1")]
    assert [t["status"] for t in others] == ["ok"] * 3
    assert doc["job"]["tiles"]["failed"] == 1
    assert any("1 test tile(s) failed" in c for c in doc["cautions"])
    assert doc["overall"]["count"] == sum(t["stats"]["count"] for t in others)
    assert (Path(tmp_path / "out") / "summary.json").is_file()
