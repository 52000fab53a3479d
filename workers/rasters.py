"""Reading tiles: the I/O edge of the tile pipeline.

Every read returns float64 heights in the tile's own unit with nodata as NaN.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
import rasterio
from numpy.typing import NDArray
from rasterio.errors import RasterioError
from rasterio.windows import Window

from workers.catalog import TileInfo
from workers.errors import TileReadError
from workers.grid import Grid


def read_tile(tile: TileInfo, *, nodata: float | None = None) -> NDArray[np.float64]:
    """The tile's first band as float64, nodata (the tile's own, else ``nodata``) as NaN."""
    try:
        with rasterio.open(tile.path) as src:
            data = src.read(1).astype(np.float64)
    except (RasterioError, OSError) as exc:
        raise TileReadError(f"tile {tile.tile_id} cannot be read: {exc}") from None
    return _nodata_to_nan(data, tile.nodata if tile.nodata is not None else nodata)


def read_mosaic(
    tiles: Sequence[TileInfo],
    bounds: tuple[float, float, float, float],
    *,
    nodata: float | None = None,
    margin_px: int = 3,
) -> tuple[NDArray[np.float64], Grid]:
    """Mosaic the parts of tiles (all on one grid) that cover bounds (in their CRS), plus a margin.

    Returns the heights (NaN where no tile or nodata) and the mosaic's grid, snapped to the tiles'
    own pixel grid so no resampling happens here. Raises TileReadError when a tile cannot be read
    or the tiles are not on one grid.
    """
    first = tiles[0].grid
    a, _, c, _, e, f = first.transform
    if first.transform[1] != 0 or first.transform[3] != 0:
        raise TileReadError(f"tile {tiles[0].tile_id} is rotated; rotated grids are not supported")
    left, bottom, right, top = bounds
    col0 = math.floor((left - c) / a) - margin_px
    col1 = math.ceil((right - c) / a) + margin_px
    row0 = math.floor((top - f) / e) - margin_px
    row1 = math.ceil((bottom - f) / e) + margin_px
    out = np.full((row1 - row0, col1 - col0), np.nan)
    for tile in tiles:
        _paste(tile, out, row0=row0, col0=col0, reference=first, nodata=nodata)
    grid = Grid(first.crs, (a, 0.0, c + col0 * a, 0.0, e, f + row0 * e), col1 - col0, row1 - row0)
    return out, grid


def _paste(
    tile: TileInfo,
    out: NDArray[np.float64],
    *,
    row0: int,
    col0: int,
    reference: Grid,
    nodata: float | None,
) -> None:
    """Copy the part of tile that falls inside out (whose pixel (0, 0) is (row0, col0) of the
    reference grid)."""
    a, _, c, _, e, f = reference.transform
    ta, tb, tc, td, te, tf = tile.grid.transform
    col_off = (tc - c) / a
    row_off = (tf - f) / e
    if (ta, tb, td, te) != (a, 0.0, 0.0, e) or not (_is_whole(col_off) and _is_whole(row_off)):
        raise TileReadError(
            f"tile {tile.tile_id} is not on the pixel grid of tile of the same CRS; "
            "reference tiles must share one grid"
        )
    tile_r0, tile_c0 = round(row_off) - row0, round(col_off) - col0
    r0, c0 = max(tile_r0, 0), max(tile_c0, 0)
    r1 = min(tile_r0 + tile.grid.height, out.shape[0])
    c1 = min(tile_c0 + tile.grid.width, out.shape[1])
    if r0 >= r1 or c0 >= c1:
        return
    window = Window(c0 - tile_c0, r0 - tile_r0, c1 - c0, r1 - r0)  # type: ignore[call-arg]
    try:
        with rasterio.open(tile.path) as src:
            block = src.read(1, window=window).astype(np.float64)
    except (RasterioError, OSError) as exc:
        raise TileReadError(f"reference tile {tile.tile_id} cannot be read: {exc}") from None
    block = _nodata_to_nan(block, tile.nodata if tile.nodata is not None else nodata)
    target = out[r0:r1, c0:c1]
    np.copyto(target, block, where=np.isnan(target))


def _is_whole(value: float, tol: float = 1e-6) -> bool:
    return abs(value - round(value)) < tol


def _nodata_to_nan(data: NDArray[np.float64], nodata: float | None) -> NDArray[np.float64]:
    if nodata is not None:
        data[data == nodata] = np.nan
    return data
