"""Float32 kept end to end (tile/reference.py, task.tile_surfaces): the same numbers as the
float64 path, whichever options make the task keep or widen the heights; and a grid's bounds
in its own CRS taken without a transform (reference.bounds_in)."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from pyproj import CRS
from rasterio.transform import from_origin
from rasterio.warp import transform_bounds

from demaudit.workers.inputs.catalog import scan_tile
from demaudit.workers.inputs.rasters import read_mosaic, read_tile
from demaudit.workers.tile import task as tile_task
from demaudit.workers.tile.align import onto_grid
from demaudit.workers.tile.difference import difference
from demaudit.workers.tile.grid import Grid
from demaudit.workers.tile.reference import bounds_in, in_metres, keeps_float32
from demaudit.workers.tile.summarise import summarise_tile
from demaudit.workers.uncertainty.error_model import ErrorModelOptions

UTM32 = "EPSG:32632"


def pair(tmp_path, tif_writer, *, shift_px=(0, 0), seed=0):
    """A test tile and a reference tile on one 5 m grid (the reference shifted by whole
    pixels and larger), float32 with voids (-9999)."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:60, 0:70].astype(np.float64)
    reference = 300 + 4 * x + 30 * np.sin(y / 6) + rng.normal(0, 0.05, x.shape)
    test = reference[5:45, 5:55] + rng.normal(0.2, 0.3, (40, 50))
    test[rng.random(test.shape) < 0.02] = -9999.0
    test[::7, ::5] += rng.uniform(-40, 40, test[::7, ::5].shape)  # tails
    transform = from_origin(500_000.0, 6_200_000.0, 5.0, 5.0)
    test_transform = from_origin(500_025.0 + 5 * shift_px[1], 6_199_975.0 - 5 * shift_px[0], 5, 5)
    t = scan_tile(str(tif_writer(tmp_path / "t.tif", test, crs=UTM32, transform=test_transform)))
    r = scan_tile(str(tif_writer(tmp_path / "r.tif", reference, crs=UTM32, transform=transform)))
    return t, r


def test_float32_layers_hold_the_float64_values(tmp_path, tif_writer) -> None:
    test, reference = pair(tmp_path, tif_writer)
    options = tile_task.TileOptions()
    assert keeps_float32(options)
    kept = tile_task.tile_surfaces(test, [reference], options)
    wide = tile_task.tile_surfaces(test, [reference], replace(options, error_model=_model()))
    assert kept.test.dtype == np.float32 and kept.reference.dtype == np.float32
    assert wide.test.dtype == np.float64 and wide.reference.dtype == np.float64
    assert kept.dh.dtype == np.float64
    np.testing.assert_array_equal(kept.dh, wide.dh)
    np.testing.assert_array_equal(kept.reference.astype(np.float64), wide.reference)
    np.testing.assert_array_equal(kept.test.astype(np.float64), wide.test)


def test_float32_layers_give_the_same_summaries(tmp_path, tif_writer) -> None:
    test, reference = pair(tmp_path, tif_writer, seed=3)
    options = tile_task.TileOptions(slope_edges_deg=(0.0, 20.0, 45.0, 60.0))
    kept = tile_task.tile_surfaces(test, [reference], options)
    wide = replace(
        kept,
        reference=kept.reference.astype(np.float64),
        test=kept.test.astype(np.float64),
    )
    got = summarise_tile(test, kept, [], options)
    want = summarise_tile(test, wide, [], options)
    for name, summary in want.strata[tile_task.ALL].items():
        other = got.strata[tile_task.ALL][name]
        assert (other.count, other.mean, other.m2) == (summary.count, summary.mean, summary.m2)
        np.testing.assert_array_equal(other.bins, summary.bins)
        np.testing.assert_array_equal(other.counts, summary.counts)
    np.testing.assert_array_equal(got.overview, want.overview)


def test_reads_keep_float32_only_when_asked(tmp_path, tif_writer) -> None:
    test, reference = pair(tmp_path, tif_writer)
    kept = read_tile(test, units="metre", keep_float32=True)
    wide = read_tile(test, units="metre")
    assert kept.dtype == np.float32 and wide.dtype == np.float64
    np.testing.assert_array_equal(kept.astype(np.float64), wide)
    assert np.isnan(kept).sum() == np.isnan(wide).sum() > 0  # the -9999 voids
    bounds = test.grid.bounds
    mosaic, grid = read_mosaic([reference], bounds, units="metre", keep_float32=True)
    wide_mosaic, wide_grid = read_mosaic([reference], bounds, units="metre")
    assert mosaic.dtype == np.float32 and grid == wide_grid
    np.testing.assert_array_equal(mosaic.astype(np.float64), wide_mosaic)


def test_cuts_keep_float32_and_warps_take_float64(tmp_path, tif_writer) -> None:
    test, reference = pair(tmp_path, tif_writer)
    mosaic, grid = read_mosaic([reference], test.grid.bounds, keep_float32=True)
    cut = onto_grid(mosaic, grid, test.grid)
    assert cut.dtype == np.float32
    np.testing.assert_array_equal(cut, onto_grid(mosaic.astype(np.float64), grid, test.grid))
    moved = replace(test.grid, transform=(5.0, 0.0, 500_027.5, 0.0, -5.0, 6_199_975.0))
    warped = onto_grid(mosaic, grid, moved)  # half a pixel: resampled by GDAL
    assert warped.dtype == np.float64
    np.testing.assert_array_equal(warped, onto_grid(mosaic.astype(np.float64), grid, moved))


def test_difference_of_float32_is_the_float64_difference() -> None:
    rng = np.random.default_rng(1)
    a = (rng.random(1000) * 3000).astype(np.float32)
    b = (rng.random(1000) * 3000).astype(np.float32)
    got = difference(a, b)
    assert got.dtype == np.float64
    np.testing.assert_array_equal(got, a.astype(np.float64) - b.astype(np.float64))


@pytest.mark.parametrize(("units", "kept"), [("metre", True), ("foot", False)])
def test_in_metres_keeps_float32_metres_only(units: str, kept: bool) -> None:
    heights = np.array([1.5, np.nan, 300.25], dtype=np.float32)
    got = in_metres(heights, units)
    assert (got is heights) == kept
    factor = 0.3048 if units == "foot" else 1.0  # international foot, exact by definition
    np.testing.assert_array_equal(got, heights.astype(np.float64) * factor)


def _model() -> ErrorModelOptions:
    return ErrorModelOptions(seed=1, samples_per_tile=10, outlier_rule="nmad", outlier_factor=5.0)


@settings(max_examples=200, deadline=None)
@given(
    epsg=st.sampled_from([25832, 3035, 32633, 3857, 4326, 4258]),
    corner=st.tuples(st.floats(0.0, 1.0), st.floats(0.0, 1.0)),
    size=st.tuples(st.integers(1, 4000), st.integers(1, 4000)),
    pixel=st.floats(1e-5, 30.0),
)
def test_bounds_in_the_grids_own_crs_are_what_the_transform_returns(epsg, corner, size, pixel):
    # bounds_in skips the transform within one CRS; rasterio's transform_bounds (GDAL, edges
    # densified) must give the very same floats there
    crs = CRS.from_epsg(epsg)
    geographic = crs.is_geographic
    step = min(pixel, 0.01) if geographic else pixel
    left = -170 + 300 * corner[0] if geographic else -5e5 + 1e6 * corner[0]
    top = -60 + 120 * corner[1] if geographic else 1e6 + 6e6 * corner[1]
    grid = Grid(crs.to_wkt(), (step, 0.0, left, 0.0, -step, top), size[0], size[1])
    assert bounds_in(grid, grid.crs) == grid.bounds
    assert tuple(transform_bounds(crs, crs, *grid.bounds, densify_pts=21)) == grid.bounds
