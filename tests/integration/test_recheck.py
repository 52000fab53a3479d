"""Nightly re-check on the demo archive: only changed tiles are recomputed, results equal a
fresh full run."""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import numpy as np
import pytest
import rasterio
from distributed import get_task_stream
from rasterio.warp import transform_bounds
from shapely.geometry import box

from service.runner import run_job
from workers import spec as job_spec

DEMO = Path(__file__).resolve().parents[2] / "demo_tiles"


def job_of(root: Path):
    spec = job_spec.parse_spec(job_spec.load_spec_file(root / "demo.yaml"))
    return job_spec.resolve(spec, base_dir=root)


def audited(client, root: Path, out: Path, baseline: Path | None = None) -> tuple[dict, list[str]]:
    """Run and return the document and the tiles the cluster actually audited."""
    with get_task_stream(client) as stream:
        doc = run_job(job_of(root), out, client=client, baseline=baseline)
    keys = {str(t["key"]) for t in stream.data}
    tiles = sorted(
        {
            k.removeprefix("audit-tile-").rsplit("-", 1)[0]
            for k in keys
            if k.startswith("audit-tile-")
        }
    )
    return doc, tiles


@pytest.fixture
def archive(tmp_path) -> Path:
    root = tmp_path / "archive"
    shutil.copytree(DEMO, root)
    return root


def test_nightly_update_recomputes_only_the_replaced_block(archive, dask_client, tmp_path):
    base, first = audited(dask_client, archive, tmp_path / "base")
    assert len(first) == 36
    for update in (archive / "release_2026_11_update").glob("*.tif"):
        shutil.copy(update, archive / "release_2026_11" / update.name)
    night, recomputed = audited(dask_client, archive, tmp_path / "night", tmp_path / "base")
    block = sorted(p.stem for p in (archive / "release_2026_11_update").glob("*.tif"))
    assert recomputed == block  # counted on the cluster's task stream
    report = night["recheck"]
    assert report["tiles_recomputed"] == block and report["tiles_reused"] == 32
    assert {t["verdict"] for t in report["tiles"]} == {"improved"}
    fresh, _ = audited(dask_client, archive, tmp_path / "fresh")
    for a, b in zip(night["regions"], fresh["regions"], strict=True):
        assert a["region"] == b["region"]
        for key in ("count", "median", "nmad", "q683_abs", "q95_abs", "rmse", "min", "max"):
            assert a["stats"][key] == pytest.approx(b["stats"][key], rel=1e-12, abs=1e-12)
    assert night["overall"] == pytest.approx(fresh["overall"])
    assert (tmp_path / "night" / "change_report.json").is_file()


def test_touching_recomputes_nothing_and_a_reference_change_its_overlaps(
    archive, dask_client, tmp_path
):
    audited(dask_client, archive, tmp_path / "base")
    for tif in (archive / "release_2026_11").glob("*.tif"):
        os.utime(tif)  # new modification time, same content
    doc, recomputed = audited(dask_client, archive, tmp_path / "touched", tmp_path / "base")
    assert recomputed == [] and doc["recheck"]["tiles_reused"] == 36

    ref = sorted((archive / "lidar_2021").glob("*.tif"))[40]
    with rasterio.open(ref, "r+") as dst:
        data = dst.read(1)
        dst.write(np.where(data == dst.nodata, data, data + 0.5).astype(data.dtype), 1)
        ref_bounds = transform_bounds(dst.crs, "EPSG:32632", *dst.bounds, densify_pts=21)
    expected = []
    for tif in sorted((archive / "release_2026_11").glob("*.tif")):
        with rasterio.open(tif) as src:
            if box(*src.bounds).intersection(box(*ref_bounds)).area > 0:
                expected.append(tif.stem)
    doc, recomputed = audited(dask_client, archive, tmp_path / "ref", tmp_path / "touched")
    assert expected and recomputed == expected
    assert all(ref.stem in t["why"] for t in doc["recheck"]["tiles"])


def test_recheck_resamples_only_checkpoints_near_changed_tiles(archive, dask_client, tmp_path):
    base, _ = audited(dask_client, archive, tmp_path / "base")
    for update in (archive / "release_2026_11_update").glob("*.tif"):
        shutil.copy(update, archive / "release_2026_11" / update.name)
    night, _ = audited(dask_client, archive, tmp_path / "night", tmp_path / "base")
    fresh, _ = audited(dask_client, archive, tmp_path / "fresh")
    # checkpoints reused where nothing changed, resampled near the new block: same as a fresh run
    assert night["checkpoints"]["stats"] == pytest.approx(fresh["checkpoints"]["stats"])
    assert night["checkpoints"]["counts"] == fresh["checkpoints"]["counts"]
    assert night["checkpoints"]["stats"] != pytest.approx(base["checkpoints"]["stats"])
