"""Nightly re-check on the demo archive: only changed tiles are recomputed, results equal a
fresh full run."""

from __future__ import annotations

import functools
import os
import shutil
from pathlib import Path

import numpy as np
import pytest
import rasterio
import yaml
import zarr
from distributed import get_task_stream
from rasterio.warp import transform_bounds
from shapely.geometry import box

from demaudit.service.run.runner import run_job
from demaudit.service.run.tile_tasks import tiles_of_key
from demaudit.workers import spec as job_spec

DEMO = Path(__file__).resolve().parents[2] / "demo_tiles"


def job_of(root: Path, spec_name: str = "demo.yaml"):
    spec = job_spec.parse_spec(job_spec.load_spec_file(root / spec_name))
    return job_spec.resolve(spec, base_dir=root)


def audited(
    client, root: Path, out: Path, baseline: Path | None = None, spec_name: str = "demo.yaml"
) -> tuple[dict, list[str]]:
    """Run and return the document and the tiles the cluster actually audited."""
    with get_task_stream(client) as stream:
        doc = run_job(job_of(root, spec_name), out, client=client, baseline=baseline)
    keys = {str(t["key"]) for t in stream.data}
    doc["_shift_estimates"] = sum(k.startswith("estimate_tile_shift") for k in keys)
    tiles = sorted({t for k in keys if k.startswith("audit-tile-") for t in tiles_of_key(k)})
    return doc, tiles


@pytest.fixture
def archive(tmp_path) -> Path:
    root = tmp_path / "archive"
    shutil.copytree(DEMO, root)
    return root


def files_of(folder: Path) -> dict[str, bytes]:
    return {str(p.relative_to(folder)): p.read_bytes() for p in folder.rglob("*") if p.is_file()}


def test_nightly_update_recomputes_only_the_replaced_block(archive, dask_client, tmp_path):
    base, first = audited(dask_client, archive, tmp_path / "base")
    assert len(first) == 36
    for update in (archive / "release_2026_11_update").glob("*.tif"):
        shutil.copy(update, archive / "release_2026_11" / update.name)
    before = files_of(tmp_path / "base" / "results.zarr")
    night, recomputed = audited(dask_client, archive, tmp_path / "night", tmp_path / "base")
    # the re-check links the baseline's files; it must leave every one of them as it was
    assert files_of(tmp_path / "base" / "results.zarr") == before
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


def test_a_recheck_of_a_recheck_equals_a_full_run(archive, dask_client, tmp_path):
    """Totals carried from night to night do not drift: two re-checks in a row, the second on a
    reference change, equal a fresh full run of the final archive."""
    audited(dask_client, archive, tmp_path / "base")
    for update in (archive / "release_2026_11_update").glob("*.tif"):
        shutil.copy(update, archive / "release_2026_11" / update.name)
    audited(dask_client, archive, tmp_path / "night1", tmp_path / "base")
    ref = sorted((archive / "lidar_2021").glob("*.tif"))[7]
    with rasterio.open(ref, "r+") as dst:
        data = dst.read(1)
        dst.write(np.where(data == dst.nodata, data, data - 0.3).astype(data.dtype), 1)
    night2, recomputed = audited(dask_client, archive, tmp_path / "night2", tmp_path / "night1")
    assert 0 < len(recomputed) < 36
    fresh, _ = audited(dask_client, archive, tmp_path / "fresh")
    assert night2["overall"] == pytest.approx(fresh["overall"], rel=1e-12)
    for area in ("regions",):
        for a, b in zip(night2[area], fresh[area], strict=True):
            assert a["stats"] == pytest.approx(b["stats"], rel=1e-12)
            for sa, sb in zip(a["strata"], b["strata"], strict=True):
                assert sa["stratum"] == sb["stratum"]
                for key, want in sb["stats"].items():  # None where a stratum is empty
                    got = sa["stats"][key]
                    assert got == (want if want is None else pytest.approx(want, rel=1e-12))
    night_map = np.asarray(
        zarr.open_array(str(tmp_path / "night2" / "results.zarr" / "dh_overview" / "dh"))[...]
    )
    fresh_map = np.asarray(
        zarr.open_array(str(tmp_path / "fresh" / "results.zarr" / "dh_overview" / "dh"))[...]
    )
    assert np.array_equal(night_map, fresh_map, equal_nan=True)


def test_a_baseline_without_job_totals_recomputes_everything_and_says_so(
    archive, dask_client, tmp_path
):
    audited(dask_client, archive, tmp_path / "base")
    shutil.rmtree(tmp_path / "base" / "results.zarr" / "job_summaries")  # as an older version
    doc, recomputed = audited(dask_client, archive, tmp_path / "night", tmp_path / "base")
    assert len(recomputed) == 36 and "recheck" not in doc
    assert any("holds no stored job totals" in c for c in doc["cautions"])


@pytest.mark.parametrize(
    "coregistration",
    [
        {"estimate_from": "tile", "apply": True},
        {"estimate_from": "job", "apply": False},
    ],
)
def test_recheck_with_coregistration_estimates_only_the_changed_tiles(
    archive, dask_client, tmp_path, coregistration
):
    """Shift estimates of unchanged tiles come from the baseline; the job's estimate and the
    statistics after correction equal a fresh full run."""
    spec = job_spec.load_spec_file(archive / "demo_coregistered.yaml")
    spec["coregistration"] = coregistration | {"fit_tilt": True}
    (archive / "recheck_coreg.yaml").write_text(yaml.safe_dump(spec), encoding="utf-8")
    run = functools.partial(audited, dask_client, archive, spec_name="recheck_coreg.yaml")
    base, _ = run(tmp_path / "base")
    assert base["_shift_estimates"] == 36
    for update in (archive / "release_2026_11_update").glob("*.tif"):
        shutil.copy(update, archive / "release_2026_11" / update.name)
    night, recomputed = run(tmp_path / "night", tmp_path / "base")
    assert len(recomputed) == 4 and night["_shift_estimates"] == 4
    assert night["coregistration"]["tiles_estimated_earlier"] == 32
    fresh, _ = run(tmp_path / "fresh")
    for key in ("east_m", "north_m", "vertical_m", "tilt_east_m_per_km", "outlier_tiles"):
        assert night["coregistration"][key] == pytest.approx(fresh["coregistration"][key])
    if coregistration["apply"]:
        got, want = night["coregistration"]["after"], fresh["coregistration"]["after"]
        assert got["overall"]["stats"] == pytest.approx(want["overall"]["stats"], rel=1e-12)
        for a, b in zip(got["regions"], want["regions"], strict=True):
            assert a["stats"] == pytest.approx(b["stats"], rel=1e-12)


def test_a_damaged_baseline_recomputes_everything_and_says_so(archive, dask_client, tmp_path):
    audited(dask_client, archive, tmp_path / "base")
    kept = sorted((tmp_path / "base" / "results.zarr" / "tile_summaries").iterdir())[3]
    shutil.rmtree(kept)  # one carried-over tile's summaries lost
    doc, recomputed = audited(dask_client, archive, tmp_path / "night", tmp_path / "base")
    assert len(recomputed) == 36 and "recheck" not in doc
    assert any("stored summaries could not be read" in c for c in doc["cautions"])


def test_editing_the_region_file_recomputes_every_tile(archive, dask_client, tmp_path):
    audited(dask_client, archive, tmp_path / "base")
    regions = archive / "provinces.geojson"
    regions.write_text(regions.read_text(encoding="utf-8") + "\n", encoding="utf-8")
    doc, recomputed = audited(dask_client, archive, tmp_path / "night", tmp_path / "base")
    assert len(recomputed) == 36
    assert all("region file content" in t["why"] for t in doc["recheck"]["tiles"])


def _rewrite_uncompressed(tif: Path, add: float) -> None:
    """The tile rewritten in place without compression, heights raised by add (same size)."""
    with rasterio.open(tif) as src:
        profile, data = src.profile, src.read(1)
    profile.update(compress=None)
    raised = np.where(data == profile["nodata"], data, data + add).astype(data.dtype)
    with rasterio.open(tif, "w", **profile) as dst:
        dst.write(raised, 1)


def test_a_rewrite_with_its_size_and_mtime_put_back_is_recomputed(archive, dask_client, tmp_path):
    """The catalog's stamp holds the ctime and inode too: a tile rewritten with the same size
    whose old mtime is put back (`touch -d`, `cp -p`) is hashed again and recomputed."""
    tif = sorted((archive / "release_2026_11").glob("*.tif"))[5]
    _rewrite_uncompressed(tif, 0.0)  # uncompressed: any heights give the same size
    base, _ = audited(dask_client, archive, tmp_path / "base")
    before = tif.stat()
    _rewrite_uncompressed(tif, 1.0)
    os.utime(tif, ns=(before.st_atime_ns, before.st_mtime_ns))
    after = tif.stat()
    assert (after.st_size, after.st_mtime_ns) == (before.st_size, before.st_mtime_ns)
    night, recomputed = audited(dask_client, archive, tmp_path / "night", tmp_path / "base")
    assert recomputed == [tif.stem] and night["recheck"]["tiles_reused"] == 35
    old, new = ({t["tile"]: t for t in doc["tiles"]}[tif.stem] for doc in (base, night))
    assert new["fingerprint"] != old["fingerprint"]
    # every valid height rose by 1 m, so the tile's median dh did too (within float32 steps)
    assert new["stats"]["median"] == pytest.approx(old["stats"]["median"] + 1.0, abs=1e-3)
