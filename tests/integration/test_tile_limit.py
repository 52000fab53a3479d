"""A tile that hangs on a live worker: the job ends with that tile failed for the time limit,
the other tiles (one of them in the hung tile's task) computed and the statistics without it
(real LocalCluster, run_job)."""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

from demaudit.service.run import tiles as tile_phase
from demaudit.service.run.runner import run_job
from demaudit.service.run.tile_limit import timeout_reason
from demaudit.workers import spec as job_spec
from demaudit.workers.tile.batch import TileCall, audit_tiles

HUNG = "t_1_0"
LIMIT_S = 5.0


def test_a_hung_tile_is_cancelled_and_the_job_goes_on(
    make_archive, dask_client, tmp_path, monkeypatch
):
    def hangs_on_one_tile(calls: list[TileCall]) -> list[Any]:
        if any(c.tile_id == HUNG for c in calls):
            time.sleep(600)  # as GDAL blocked on a hung network mount
        return audit_tiles(calls)

    monkeypatch.setattr(tile_phase, "audit_tiles", hangs_on_one_tile)
    root = make_archive(tiles=2, pixels=40)
    spec = job_spec.parse_spec(job_spec.load_spec_file(root / "job.yaml"))
    job = job_spec.resolve(spec, base_dir=root)
    doc = run_job(
        job, tmp_path / "out", client=dask_client, tile_timeout_s=LIMIT_S, tiles_per_task=2
    )  # the hung tile's task of two is cut short at 2 x LIMIT_S, then each runs alone

    tiles = {t["tile"]: t for t in doc["tiles"]}
    assert tiles[HUNG]["status"] == "failed"
    assert tiles[HUNG]["reason"] == timeout_reason(HUNG, LIMIT_S)
    others = [tiles[t] for t in ("t_0_0", "t_0_1", "t_1_1")]
    assert [t["status"] for t in others] == ["ok"] * 3
    assert doc["job"]["tiles"]["failed"] == 1
    assert any("1 test tile(s) failed" in c for c in doc["cautions"])
    assert doc["overall"]["count"] == sum(t["stats"]["count"] for t in others)
    assert (Path(tmp_path / "out") / "summary.json").is_file()
