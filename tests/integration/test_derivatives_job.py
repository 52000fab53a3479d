"""A small job with ``derivatives:`` on: summary.json's derivatives section agrees with the
derived parameters recomputed here on the same pixels, a test equal to its reference gives zero
differences and full D8 agreement, results.zarr and report.html show them."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import rioxarray  # noqa: F401
import xarray as xr

from demaudit.service.run.runner import run_job
from demaudit.workers import spec as job_spec
from demaudit.workers.inputs.catalog import scan_tile
from demaudit.workers.inputs.regions import read_regions, region_mask, to_crs
from demaudit.workers.inputs.tile_index import TileIndex
from demaudit.workers.tile.derivatives import (
    ASPECT,
    PARAMETERS,
    SLOPE,
    d8_compared,
    derived_differences,
    surface_derivatives,
)
from demaudit.workers.tile.task import TileOptions, tile_surfaces

DERIVATIVES = {"min_slope_deg": 2.0}


def load(root: Path, **changes: object) -> job_spec.ResolvedJob:
    raw = job_spec.load_spec_file(root / "job.yaml") | {"derivatives": DERIVATIVES} | changes
    return job_spec.resolve(job_spec.parse_spec(raw), base_dir=root)


def recomputed(
    job: job_spec.ResolvedJob,
) -> tuple[dict[str, list[np.ndarray]], dict[str, list[int]]]:
    """Every tile's derived differences (pooled) and D8 counts per area, in this process."""
    options = TileOptions.from_spec(job.spec)
    tests = [scan_tile(p) for p in job.test_tiles]
    index = TileIndex([scan_tile(p) for p in job.reference_tiles])
    regions = to_crs(read_regions(job.region_file, id_property="code"), tests[0].grid.crs)
    values: dict[str, list[np.ndarray]] = {name: [] for name in PARAMETERS}
    d8 = {"*": [0, 0]} | {r.region_id: [0, 0] for r in regions}
    for tile in tests:
        layers = tile_surfaces(tile, index.overlapping(tile.grid), options)
        px, py = tile.grid.pixel_size_m()
        size = {"pixel_size_x_m": px, "pixel_size_y_m": py}
        of_test = surface_derivatives(layers.test, **size)
        of_reference = surface_derivatives(layers.reference, **size)
        for name, diff in derived_differences(of_test, of_reference, min_slope_deg=2.0).items():
            values[name].append(diff[np.isfinite(diff)])
        compared, agree = d8_compared(of_test, of_reference)
        masks = {"*": np.ones(compared.shape, bool)}
        masks |= {r.region_id: region_mask(r, tile.grid) for r in regions}
        for area, mask in masks.items():
            d8[area][0] += int(np.count_nonzero(agree & mask))
            d8[area][1] += int(np.count_nonzero(compared & mask))
    return values, d8


def test_derivatives_section_agrees_with_a_recomputation(make_archive, dask_client, tmp_path):
    root = make_archive(tiles=2, pixels=40, bias=0.25, noise=0.3, seed=3)
    job = load(root)
    out = tmp_path / "out"
    doc = run_job(job, out, client=dask_client, progress=None)
    section = doc["derivatives"]
    values, d8 = recomputed(job)
    for name in PARAMETERS:
        pooled = np.concatenate(values[name])
        stats = section[name]["overall"]["stats"]
        assert stats["count"] == pooled.size > 0, name
        assert stats["mean"] == pytest.approx(pooled.mean(), rel=1e-9, abs=1e-9), name
        # reference: numpy on the same pixels; the median is within one bin of the summary
        # (summarised in units of SUMMARY_SCALE: bins of bin_width, 0.01 % relative beyond)
        median = float(np.median(pooled))
        bound = max(section[name]["bin_width"], 1e-4 * abs(median))
        assert abs(stats["median"] - median) <= bound * (1 + 1e-9), name
        assert {s["stratum"] for s in section[name]["overall"]["strata"]} >= {"slope_deg:0-5"}
    assert abs(section[ASPECT]["overall"]["stats"]["max"]) <= 180
    overall = section["d8_agreement"]["overall"]
    assert [overall["agree"], overall["compared"]] == d8["*"]
    assert 0 < overall["share"] < 1  # noise of 0.3 m moves some directions
    regions = {r["region"]: r for r in section["d8_agreement"]["regions"]}
    assert [regions["WEST"]["agree"], regions["WEST"]["compared"]] == d8["WEST"]
    assert regions["FAR"]["compared"] == 0 and regions["FAR"]["share"] is None
    # the tile records and the outputs on disk
    tile = doc["tiles"][0]
    assert tile["derivatives"][SLOPE]["count"] > 0 and "d8_agreement" in tile["derivatives"]
    on_disk = json.loads((out / "summary.json").read_text())
    assert on_disk["derivatives"]["units"][SLOPE] == "degree"
    assert any("3 x 3 window" in c for c in on_disk["cautions"])
    overview = xr.open_zarr(out / "results.zarr", group="derivatives_overview", decode_coords="all")
    assert set(overview.data_vars) == set(PARAMETERS)
    assert overview[SLOPE].rio.crs.to_epsg() == 32632
    assert overview.sizes == {"y": 10, "x": 10}
    assert np.isfinite(overview[SLOPE].values).mean() > 0.9
    assert "Derived parameters" in (out / "report.html").read_text()


def test_a_test_equal_to_its_reference_has_no_derived_differences(
    make_archive, dask_client, tmp_path
):
    root = make_archive(tiles=2, pixels=40, noise=0.3, seed=4)
    same = {"tiles": "test/*.tif", "vertical_crs": "ellipsoidal", "units": "metre"}
    doc = run_job(load(root, reference=same), tmp_path / "out", client=dask_client)
    assert doc["overall"]["count"] > 0 and doc["overall"]["max"] == 0.0
    section = doc["derivatives"]
    for name in PARAMETERS:
        stats = section[name]["overall"]["stats"]
        assert stats["count"] > 0 and stats["min"] == stats["max"] == 0.0, name
    overall = section["d8_agreement"]["overall"]
    # 4 tiles of 40 x 40, the outermost ring of each left out: 4 x 38 x 38 compared
    assert overall["compared"] == 4 * 38 * 38 and overall["share"] == 1.0


def test_derivatives_are_opt_in(make_archive, dask_client, tmp_path):
    root = make_archive(tiles=1, pixels=40)
    raw = job_spec.load_spec_file(root / "job.yaml")
    doc = run_job(
        job_spec.resolve(job_spec.parse_spec(raw), base_dir=root),
        tmp_path / "out",
        client=dask_client,
    )
    assert "derivatives" not in doc
    assert "derivatives" not in doc["tiles"][0]
