"""onto_grid: a target made of source pixels is cut out, and the cut equals GDAL's resampling."""

from __future__ import annotations

import numpy as np
import pytest
from pyproj import CRS
from rasterio import crs as rasterio_crs
from rasterio.warp import reproject

from demaudit.workers.tile.align import _RESAMPLING, onto_grid, whole_pixel_offset
from demaudit.workers.tile.grid import Grid

UTM32 = CRS.from_epsg(32632).to_wkt()


def gdal(source: np.ndarray, src: Grid, dst: Grid, resampling: str) -> np.ndarray:
    # Reference: rasterio.warp.reproject (GDAL's warper), as onto_grid calls it off the fast path.
    out = np.full(dst.shape, np.nan)
    reproject(
        source=source,
        destination=out,
        src_transform=src.affine,
        src_crs=rasterio_crs.CRS.from_wkt(src.crs),
        src_nodata=np.nan,
        dst_transform=dst.affine,
        dst_crs=rasterio_crs.CRS.from_wkt(dst.crs),
        dst_nodata=np.nan,
        resampling=_RESAMPLING[resampling],
    )
    return out


def source_grid() -> tuple[np.ndarray, Grid]:
    rng = np.random.default_rng(0)
    z = 200 + rng.normal(0, 5, (60, 70)).cumsum(axis=0)
    z[rng.random(z.shape) < 0.05] = np.nan
    return z, Grid(UTM32, (2.0, 0.0, 480_000.0, 0.0, -2.0, 6_230_000.0), 70, 60)


def sub_grid(src: Grid, row: int, col: int, rows: int, cols: int) -> Grid:
    a, b, c, d, e, f = src.transform
    return Grid(src.crs, (a, b, c + col * a, d, e, f + row * e), cols, rows)


@pytest.mark.parametrize("resampling", sorted(_RESAMPLING))
@pytest.mark.parametrize(
    "window", [(0, 0, 60, 70), (3, 5, 40, 50), (-4, -6, 30, 30), (50, 60, 20, 20), (70, 0, 5, 5)]
)
def test_whole_pixel_targets_are_cut_and_equal_gdal(resampling: str, window) -> None:
    z, src = source_grid()
    dst = sub_grid(src, *window)
    assert whole_pixel_offset(src, dst) == window[:2]
    got = onto_grid(z, src, dst, resampling=resampling)
    np.testing.assert_array_equal(got, gdal(z, src, dst, resampling))
    assert not np.shares_memory(got, z)


def test_other_grids_are_resampled() -> None:
    z, src = source_grid()
    a, b, c, d, e, f = src.transform
    half = Grid(src.crs, (a, b, c + 1.0, d, e, f), 30, 30)  # half a pixel east
    finer = Grid(src.crs, (1.0, b, c, d, -1.0, f), 30, 30)
    other_crs = Grid(CRS.from_epsg(3035).to_wkt(), src.transform, 30, 30)
    for dst in (half, finer, other_crs):
        assert whole_pixel_offset(src, dst) is None
    got = onto_grid(z, src, half, resampling="bilinear")
    np.testing.assert_array_equal(got, gdal(z, src, half, "bilinear"))


def test_an_equivalent_crs_in_other_words_counts_as_the_same() -> None:
    z, src = source_grid()
    dst = Grid(CRS.from_epsg(32632).to_wkt(version="WKT2_2019"), src.transform, 70, 60)
    assert whole_pixel_offset(src, dst) == (0, 0)
    np.testing.assert_array_equal(onto_grid(z, src, dst), z)
