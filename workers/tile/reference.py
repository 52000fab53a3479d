"""The reference side of a tile: read the reference tiles covering it as mosaics (one per CRS),
put them on the test tile's grid, in metres and in the test's vertical datum.

Float32 files may stay float32 where nothing downstream needs float64 arrays (``keep_float32``):
the same values in half the bytes, with no copy. Every difference, resampling and datum offset is
then computed on the float64 values they hold, so the numbers are those of the float64 path.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray
from rasterio.warp import transform_bounds

from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.inputs.rasters import read_mosaic, read_tile
from demaudit.workers.spec import METRES_PER_UNIT
from demaudit.workers.tile.align import onto_grid
from demaudit.workers.tile.datum import to_metres, vertical_offset_on_grid
from demaudit.workers.tile.grid import Grid, crs_of
from demaudit.workers.tile.records import Mosaic, TileOptions


def keeps_float32(options: TileOptions) -> bool:
    """Whether a tile's height arrays may stay float32: only the summaries and the overview use
    them (no co-registration, error model or derived parameters, which take float64 arrays)."""
    return (
        options.coregistration is None
        and options.error_model is None
        and options.derivatives is None
    )


def in_metres(heights: NDArray[np.floating], units: str) -> NDArray[np.floating]:
    """heights in metres: float32 metres as they are (see keeps_float32), else datum.to_metres
    (float64)."""
    if heights.dtype == np.float32 and METRES_PER_UNIT.get(units) == 1.0:
        return heights
    return to_metres(heights, units)


def test_heights(
    test: TileInfo, options: TileOptions, *, keep_float32: bool = False
) -> NDArray[np.floating]:
    """The test tile's heights in metres (NaN = nodata), checked (rasters.read_tile)."""
    units = options.test_units
    read = read_tile(test, nodata=options.test_nodata, units=units, keep_float32=keep_float32)
    return in_metres(read, units)


def reference_heights(
    mosaics: Sequence[Mosaic], grid: Grid, options: TileOptions
) -> NDArray[np.floating]:
    """The reference mosaics resampled onto grid (the spec's resampling), in metres and in the
    test's vertical datum (the datum offset evaluated at grid's pixel centres). Float32 only
    when the mosaics are, on grid's own pixels, in metres and with no datum offset."""
    reference = in_metres(
        mosaics_onto(mosaics, grid, resampling=options.resampling), options.reference_units
    )
    offset = vertical_offset_on_grid(
        grid,
        from_crs=options.reference_vertical_crs,
        to_crs=options.test_vertical_crs,
        grid_dirs=options.grid_dirs,
    )
    if offset is not None:
        reference = np.asarray(reference, dtype=np.float64)  # a float32 cut: a new array
        reference += offset
    return reference


def resampled_onto(
    tiles: Sequence[TileInfo], grid: Grid, *, resampling: str, nodata: float | None
) -> NDArray[np.floating]:
    """Values of tiles (own unit and datum) resampled onto grid (float64); NaN where none."""
    return mosaics_onto(read_mosaics(tiles, grid, nodata=nodata), grid, resampling=resampling)


def read_mosaics(
    tiles: Sequence[TileInfo],
    grid: Grid,
    *,
    nodata: float | None,
    units: str | None = None,
    keep_float32: bool = False,
) -> tuple[Mosaic, ...]:
    """The parts of tiles that cover grid, one mosaic per CRS (own unit and datum). With units
    (heights, not land cover) each tile's values are checked (rasters.check_heights)."""
    by_crs: dict[str, list[TileInfo]] = {}
    for tile in tiles:
        by_crs.setdefault(tile.grid.crs, []).append(tile)
    mosaics = []
    for crs, members in by_crs.items():
        bounds = bounds_in(grid, crs)
        found = read_mosaic(members, bounds, nodata=nodata, units=units, keep_float32=keep_float32)
        mosaics.append(found)
    return tuple(mosaics)


def bounds_in(grid: Grid, crs: str) -> tuple[float, float, float, float]:
    """grid's bounds in crs (WKT), edges densified; in grid's own CRS they are its bounds as
    they are (what the identity transform returns, tested; 0.3 ms a tile saved)."""
    if crs == grid.crs:
        return grid.bounds
    left, bottom, right, top = transform_bounds(
        crs_of(grid.crs), crs_of(crs), *grid.bounds, densify_pts=21
    )
    return left, bottom, right, top


def mosaics_onto(mosaics: Sequence[Mosaic], grid: Grid, *, resampling: str) -> NDArray[np.floating]:
    """Mosaics resampled onto grid, the first covering a pixel winning; NaN where none."""
    if len(mosaics) == 1:  # onto_grid gives a new array: nothing to combine
        mosaic, mosaic_grid = mosaics[0]
        return onto_grid(mosaic, mosaic_grid, grid, resampling=resampling)
    out = np.full(grid.shape, np.nan)
    for mosaic, mosaic_grid in mosaics:
        resampled = onto_grid(mosaic, mosaic_grid, grid, resampling=resampling)
        np.copyto(out, resampled, where=np.isnan(out))
    return out
