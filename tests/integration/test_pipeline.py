"""The whole chain on a tiny archive: other CRS, other tiling, geoid, Dask, Zarr, JSON."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
import rioxarray  # noqa: F401
import xarray as xr
from scipy.stats import median_abs_deviation

from demaudit.service.run.runner import run_job
from demaudit.workers import spec as job_spec
from demaudit.workers.errors import EmptyOverlapError, SpecError
from demaudit.workers.inputs.catalog import scan_tile
from demaudit.workers.inputs.regions import read_regions, region_mask, to_crs
from demaudit.workers.inputs.tile_index import TileIndex
from demaudit.workers.stats.summary import nmad_bound_m, quantile_bound_m
from demaudit.workers.tile.task import TileOptions, tile_surfaces


def load(root: Path):
    spec = job_spec.parse_spec(job_spec.load_spec_file(root / "job.yaml"))
    return job_spec.resolve(spec, base_dir=root)


def numpy_stats(x: np.ndarray) -> dict:
    # reference: numpy and scipy on the same pixels (../shared/CHECK_VALUES.md)
    return {
        "count": x.size,
        "mean": x.mean(),
        "median": np.median(x),
        "nmad": median_abs_deviation(x, scale="normal"),
        "q683_abs": np.quantile(np.abs(x), 0.683),
        "q95_abs": np.quantile(np.abs(x), 0.95),
        "rmse": np.sqrt(np.mean(x**2)),
        "std": np.std(x, ddof=1),
    }


def assert_agrees(got: dict, x: np.ndarray) -> None:
    want = numpy_stats(x)
    assert got["count"] == want["count"]
    for key in ("mean", "rmse", "std"):
        assert got[key] == pytest.approx(want[key], rel=1e-9, abs=1e-9)
    for key in ("median", "q683_abs", "q95_abs"):
        assert abs(got[key] - want[key]) <= quantile_bound_m(want[key])
    assert abs(got["nmad"] - want["nmad"]) <= nmad_bound_m(want["median"], want["nmad"])


def test_statistics_agree_with_numpy_on_the_same_pixels(make_archive, dask_client, tmp_path):
    root = make_archive(tiles=2, pixels=40, bias=0.25, noise=0.3, seed=3)
    job = load(root)
    doc = run_job(job, tmp_path / "out", client=dask_client, progress=None)

    # recompute every tile's dh in this process, then compare with numpy/scipy
    options = TileOptions.from_spec(job.spec)
    tests = [scan_tile(p) for p in job.test_tiles]
    index = TileIndex([scan_tile(p) for p in job.reference_tiles])
    regions = to_crs(read_regions(job.region_file, id_property="code"), tests[0].grid.crs)
    all_dh, per_region = [], {r.region_id: [] for r in regions}
    tiles_doc = {t["tile"]: t for t in doc["tiles"]}
    for tile in tests:
        dh = tile_surfaces(tile, index.overlapping(tile.grid), options).dh
        valid = dh[np.isfinite(dh)]
        assert_agrees(tiles_doc[tile.tile_id]["stats"], valid)
        all_dh.append(valid)
        for region in regions:
            mask = region_mask(region, tile.grid) & np.isfinite(dh)
            per_region[region.region_id].append(dh[mask])
    assert_agrees(doc["overall"], np.concatenate(all_dh))
    regions_doc = {r["region"]: r for r in doc["regions"]}
    for region_id in ("WEST", "EAST"):  # both cross tile edges
        assert_agrees(regions_doc[region_id]["stats"], np.concatenate(per_region[region_id]))
    # a region away from the data is reported, not dropped
    assert regions_doc["FAR"]["stats"]["count"] == 0
    assert "no valid pixels" in regions_doc["FAR"]["note"]


def test_noise_free_chain_recovers_the_bias(make_archive, dask_client, tmp_path):
    # other CRS (EPSG:3035), finer grid, other tiling, EGM96 -> ellipsoidal
    root = make_archive(tiles=2, pixels=40, bias=0.25, noise=0.0)
    doc = run_job(load(root), tmp_path / "out", client=dask_client)
    assert abs(doc["overall"]["median"] - 0.25) < 0.01
    assert doc["overall"]["nmad"] < 0.01
    assert doc["sign"] == "test minus reference"


def test_outputs_open_as_documented(make_archive, dask_client, tmp_path):
    root = make_archive(tiles=2, pixels=40)
    out = tmp_path / "out"
    doc = run_job(load(root), out, client=dask_client)
    on_disk = json.loads((out / "summary.json").read_text())
    assert on_disk["overall"]["count"] == doc["overall"]["count"] > 0
    assert any("do not replace" in c for c in on_disk["cautions"])
    tiles = xr.open_zarr(out / "results.zarr", group="tiles")
    assert tiles.sizes["tile"] == 4
    assert {"left", "bottom", "right", "top", "status"} <= set(tiles.coords)
    assert float(tiles["median"].sel(tile="t_0_0")) == pytest.approx(
        next(t for t in doc["tiles"] if t["tile"] == "t_0_0")["stats"]["median"]
    )
    regions = xr.open_zarr(out / "results.zarr", group="regions")
    assert list(regions["region"].values) == ["WEST", "EAST", "FAR"]
    overview = xr.open_zarr(out / "results.zarr", group="dh_overview", decode_coords="all")
    assert overview["dh"].rio.crs.to_epsg() == 32632
    assert overview.sizes == {"y": 10, "x": 10}
    assert np.nanmedian(overview["dh"].values) == pytest.approx(0.25, abs=0.02)


def test_corrupt_and_crs_less_tiles_fail_alone(make_archive, dask_client, tmp_path, tif_writer):
    from rasterio.transform import from_origin

    root = make_archive()
    (root / "test" / "garbage.tif").write_bytes(b"II*\x00 not really a tiff " * 20)
    tif_writer(
        root / "test" / "no_crs.tif",
        np.zeros((10, 10)),
        crs=None,
        transform=from_origin(480_000, 6_230_000, 5.0, 5.0),
    )
    whole = (root / "test" / "t_1_1.tif").read_bytes()
    (root / "test" / "truncated.tif").write_bytes(whole[: len(whole) // 2])
    doc = run_job(load(root), tmp_path / "out", client=dask_client)
    tiles = {t["tile"]: t for t in doc["tiles"]}
    assert tiles["garbage"]["status"] == "failed"
    assert "cannot be opened" in tiles["garbage"]["reason"]
    assert tiles["no_crs"]["status"] == "failed"
    assert "has no CRS" in tiles["no_crs"]["reason"]
    assert tiles["truncated"]["status"] == "failed"
    assert "truncated" in tiles["truncated"]["reason"]
    assert [tiles[f"t_{c}_{r}"]["status"] for c in (0, 1) for r in (0, 1)] == ["ok"] * 4
    assert doc["overall"]["count"] > 0
    assert doc["job"]["tiles"]["failed"] == 3
    assert any("3 test tile(s) failed" in c for c in doc["cautions"])


def test_region_outside_the_data_is_a_clear_error(make_archive, dask_client, tmp_path):
    root = make_archive()
    regions = json.loads((root / "regions.geojson").read_text())
    regions["features"] = [f for f in regions["features"] if f["properties"]["code"] == "FAR"]
    (root / "regions.geojson").write_text(json.dumps(regions))
    with pytest.raises(EmptyOverlapError, match="none of the 1 regions overlaps"):
        run_job(load(root), tmp_path / "out", client=dask_client)


def test_unknown_unit_and_missing_file_are_named(make_archive):
    root = make_archive()
    text = (root / "job.yaml").read_text()
    (root / "job.yaml").write_text(
        text.replace("units: metre}\nreference", "units: yard}\nreference")
    )
    with pytest.raises(SpecError, match=r"test\.units"):
        load(root)
    shutil.rmtree(root / "ref")
    (root / "job.yaml").write_text(text)
    with pytest.raises(SpecError, match=r"reference\.tiles: no such file"):
        load(root)


def test_figures_are_drawn(make_archive, dask_client, tmp_path):
    from PIL import Image

    root = make_archive(tiles=2, pixels=40)
    doc = run_job(load(root), tmp_path / "out", client=dask_client)
    assert "dh_map.png" in doc["figures"]
    with Image.open(tmp_path / "out" / "dh_map.png") as image:
        assert image.size[0] > 300 and image.size[1] > 300


def test_a_wrong_datum_is_flagged(make_archive, dask_client, tmp_path):
    # the reference declared ellipsoidal although it holds EGM96 heights: dh is off by N (~40 m)
    root = make_archive(tiles=1, pixels=40)
    data = job_spec.load_spec_file(root / "job.yaml")
    data["reference"]["vertical_crs"] = "ellipsoidal"
    job = job_spec.resolve(job_spec.parse_spec(data), base_dir=root)
    doc = run_job(job, tmp_path / "out", client=dask_client)
    assert doc["overall"]["median"] > 30
    assert any("check the vertical datum" in c for c in doc["cautions"])


def test_the_overview_blocks_fit_its_grid_when_tiles_are_not_a_multiple_of_the_factor(
    make_archive, dask_client, tmp_path
):
    # 42 px tiles: the mosaic decimates by 7 (the largest divisor <= 8); each tile's blocks must
    # be means of 7 x 7 pixels too, or the overview shows each tile at the wrong scale
    root = make_archive(tiles=2, pixels=42, bias=0.25, noise=1.0, seed=5)
    job = load(root)
    out = tmp_path / "out"
    run_job(job, out, client=dask_client)
    overview = xr.open_zarr(out / "results.zarr", group="dh_overview", decode_coords="all")
    assert overview.sizes == {"y": 12, "x": 12}
    assert overview["dh"].rio.resolution() == (35.0, -35.0)
    options = TileOptions.from_spec(job.spec)
    index = TileIndex([scan_tile(p) for p in job.reference_tiles])
    tile = scan_tile(next(p for p in job.test_tiles if p.name == "t_1_0.tif"))
    dh = tile_surfaces(tile, index.overlapping(tile.grid), options).dh
    # reference: numpy block means of the tile's own dh (7 x 7 pixels per cell)
    with np.errstate(invalid="ignore"):
        expected = np.nanmean(dh.reshape(6, 7, 6, 7), axis=(1, 3))
    got = overview["dh"].values[0:6, 6:12]
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-4)
