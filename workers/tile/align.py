"""Put the reference on the test tile's grid: reproject and resample (pure, in memory)."""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from numpy.typing import NDArray
from rasterio import crs as rasterio_crs
from rasterio.enums import Resampling
from rasterio.warp import reproject

from demaudit.workers.tile.grid import Grid

_RESAMPLING = {
    "nearest": Resampling.nearest,
    "bilinear": Resampling.bilinear,
    "cubic": Resampling.cubic,
    "average": Resampling.average,
}


def onto_grid(
    source: NDArray[np.floating], source_grid: Grid, target: Grid, *, resampling: str = "bilinear"
) -> NDArray[np.floating]:
    """Resample source (NaN = nodata) from source_grid onto target; NaN where nothing covers.

    Heights are not changed, only moved: units and vertical datum are the source's. When the
    target's pixels are pixels of the source grid (same CRS and pixel size, whole-pixel offset)
    they are copied, not resampled: any resampling returns exactly these values there (float32
    stays float32, anything else becomes float64). Otherwise GDAL resamples source as float64
    into a float64 result.
    """
    offset = whole_pixel_offset(source_grid, target)
    if offset is not None:
        return _cut(source, offset, target.shape)
    out = np.full(target.shape, np.nan)
    reproject(
        source=np.ascontiguousarray(source, dtype=np.float64),
        destination=out,
        src_transform=source_grid.affine,
        src_crs=rasterio_crs.CRS.from_wkt(source_grid.crs),
        src_nodata=np.nan,
        dst_transform=target.affine,
        dst_crs=rasterio_crs.CRS.from_wkt(target.crs),
        dst_nodata=np.nan,
        resampling=_RESAMPLING[resampling],
    )
    return out


#: A whole-pixel offset must be this close to an integer (in pixels) to be taken as one.
OFFSET_TOLERANCE_PX = 1e-6


def whole_pixel_offset(source: Grid, target: Grid) -> tuple[int, int] | None:
    """(row, col) of the target's first pixel on the source grid when the target's pixels are
    source pixels (same CRS, same north-up pixel size, whole-pixel offset); None otherwise."""
    a, b, c, d, e, f = source.transform
    ta, tb, tc, td, te, tf = target.transform
    if (a, b, d, e) != (ta, tb, td, te) or b != 0 or d != 0:
        return None
    col, row = (tc - c) / a, (tf - f) / e
    if abs(col - round(col)) > OFFSET_TOLERANCE_PX or abs(row - round(row)) > OFFSET_TOLERANCE_PX:
        return None
    if source.crs != target.crs and not _same_crs(source.crs, target.crs):
        return None
    return round(row), round(col)


@lru_cache(maxsize=64)
def _same_crs(wkt_a: str, wkt_b: str) -> bool:
    return bool(rasterio_crs.CRS.from_wkt(wkt_a) == rasterio_crs.CRS.from_wkt(wkt_b))


def _cut(
    source: NDArray[np.floating], offset: tuple[int, int], shape: tuple[int, int]
) -> NDArray[np.floating]:
    """A new array of shape holding source from (row, col) = offset on; NaN beyond source."""
    row, col = offset
    rows, cols = source.shape
    r0, c0 = max(row, 0), max(col, 0)
    r1, c1 = min(row + shape[0], rows), min(col + shape[1], cols)
    dtype = np.float32 if source.dtype == np.float32 else np.float64
    if (r0, c0, r1, c1) == (row, col, row + shape[0], col + shape[1]):
        return np.array(source[r0:r1, c0:c1], dtype=dtype)
    out = np.full(shape, np.nan, dtype=dtype)
    if r0 < r1 and c0 < c1:
        out[r0 - row : r1 - row, c0 - col : c1 - col] = source[r0:r1, c0:c1]
    return out
