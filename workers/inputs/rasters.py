"""Reading tiles: the I/O edge of the tile pipeline.

Every read returns float64 heights in the tile's own unit with nodata as NaN. Nodata is the
tile's own tag and the spec's ``nodata`` (both, when both are given). Heights are then checked
for values no terrain has (``implausible_heights``): voids coded -9999, -32767 or -3.4e38
without a nodata tag would otherwise be averaged in as heights; such a tile is refused with
``ImplausibleHeightsError`` naming the value, its share and the spec field that fixes it.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import cast

import numpy as np
from numpy.typing import NDArray
from rasterio.errors import RasterioError
from rasterio.windows import Window

from demaudit.workers.errors import DataRootError, ImplausibleHeightsError, TileReadError
from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.inputs.confine import open_confined
from demaudit.workers.inputs.tiff_blocks import read_band
from demaudit.workers.spec import METRES_PER_UNIT
from demaudit.workers.tile import kernels
from demaudit.workers.tile.grid import Grid

#: Heights (metres) terrain on Earth can have, with a margin: the deepest ocean trench is
#: about -10,935 m and the highest summit 8,849 m; ellipsoidal and geoid-based heights differ by
#: at most about 110 m (from memory; common practice for plausibility checks).
PLAUSIBLE_HEIGHT_M = (-11_000.0, 9_000.0)
#: Values commonly written into voids (file units): refused when they are a tile's extreme.
VOID_CODES = (-9999.0, -99999.0, -32767.0, -32768.0, float(np.finfo(np.float32).min))
#: An extreme value held by two pixels or more and this far (metres) from every other value of
#: the tile is a void code, not terrain (no slope, cliff or pit leaves such a gap empty).
VOID_GAP_M = 1_000.0


@dataclass(frozen=True)
class Implausible:
    """A value of a tile that cannot be a height: how many pixels hold it, and why."""

    value: float  # file units
    count: int  # pixels holding it
    valid: int  # pixels that are not nodata
    why: str


def read_tile(
    tile: TileInfo,
    *,
    nodata: float | None = None,
    units: str | None = None,
    keep_float32: bool = False,
) -> NDArray[np.floating]:
    """The tile's first band as float64 (file units), nodata as NaN.

    With ``units`` (the unit of the heights; the tile task always gives it) the values are
    checked: ImplausibleHeightsError when they hold a void code or heights no terrain has (see
    implausible_heights). With ``keep_float32`` a float32 band stays float32 (the same values,
    half the bytes, no copy).
    """
    raw = _read_band(tile, "tile", None)
    if keep_float32 and raw.dtype == np.float32:
        data = _voids_to_nan(raw, (tile.nodata, nodata), out=cast("NDArray[np.float32]", raw))
    else:
        data = _voids_to_nan(raw, (tile.nodata, nodata))
    if units is not None:
        check_heights(data, tile_id=tile.tile_id, units=units, role="test")
    return data


def check_heights(data: NDArray[np.floating], *, tile_id: str, units: str, role: str) -> None:
    """Raise ImplausibleHeightsError when data (file units, NaN = nodata) cannot be heights.

    ``role`` is 'test' or 'reference': the message names the tile and the spec field
    (``<role>.nodata``) that declares the value a void.
    """
    found = implausible_heights(data, metres_per_unit=METRES_PER_UNIT[units])
    if found is None:
        return
    value = format_value(found.value)
    share = found.count / found.valid if found.valid else 1.0
    raise ImplausibleHeightsError(
        f"{role} tile {tile_id}: {found.count:,} of {found.valid:,} pixels ({share:.1%}) hold "
        f"{value}, {found.why}; the tile was not used. If {value} marks voids, set "
        f"'{role}: {{nodata: {value}}}' in the job spec"
    )


def implausible_heights(
    data: NDArray[np.floating], *, metres_per_unit: float = 1.0
) -> Implausible | None:
    """The value of data (file units, NaN = nodata) that shows it is not all terrain, or None.

    Rules, in order: a value outside PLAUSIBLE_HEIGHT_M once converted to metres (or infinite;
    the most frequent such value is named); the tile's lowest or highest value when it is a
    common void code (VOID_CODES); the lowest or highest value when two pixels or more hold it
    and every other value lies more than VOID_GAP_M away. A tile of one value only (a flat lake)
    passes unless that value is a void code.
    """
    fast = kernels.AVAILABLE and data.dtype in (np.float64, np.float32) and data.ndim <= 2
    if not fast:  # numpy compares float32 with a Python float in float32: widen first
        data = np.asarray(data, dtype=np.float64)
    plane = data.reshape(1, -1) if fast and data.ndim < 2 else data  # the kernels take 2-D
    valid, low, high, n_low, n_high = _extremes(data)
    if valid == 0:
        return None
    lowest, highest = (v / metres_per_unit for v in PLAUSIBLE_HEIGHT_M)
    if low < lowest or high > highest:
        data = np.asarray(data, dtype=np.float64)  # a refusal: what follows is numpy's
        with np.errstate(invalid="ignore"):
            outside = data[(data < lowest) | (data > highest)]
        values, counts = np.unique(outside, return_counts=True)
        value = float(values[np.argmax(counts)])
        why = (
            "which is not a finite number"
            if not math.isfinite(value)
            else "far outside the heights terrain can have "
            f"({PLAUSIBLE_HEIGHT_M[0]:,.0f} to {PLAUSIBLE_HEIGHT_M[1]:,.0f} m)"
        )
        return Implausible(value, int(np.count_nonzero(data == value)), valid, why)
    gap = VOID_GAP_M / metres_per_unit
    for value, count, near in ((low, n_low, (low, low + gap)), (high, n_high, (high - gap, high))):
        if value in VOID_CODES:
            return Implausible(value, count, valid, "a common code for voids")
        if count < 2 or low == high:
            continue
        if _other_within(plane, near, value, compiled=fast):
            continue
        data = np.asarray(data, dtype=np.float64)  # a refusal: what follows is numpy's
        with np.errstate(invalid="ignore"):
            others = data[data != value]
        nearest = float(np.nanmin(np.abs(others - value))) * metres_per_unit
        return Implausible(
            value,
            count,
            valid,
            f"{nearest:,.0f} m away from every other height of the tile (a void code, not terrain)",
        )
    return None


def _extremes(data: NDArray[np.floating]) -> tuple[int, float, float, int, int]:
    """(count of non-NaN values, lowest, highest, how many hold the lowest, how many the
    highest); (0, nan, nan, 0, 0) when every value is NaN. Vectorised reductions (fmin / fmax
    skip NaN), in the data's own type."""
    valid = int(data.size - np.count_nonzero(np.isnan(data)))
    if valid == 0:
        return 0, math.nan, math.nan, 0, 0
    low, high = np.fmin.reduce(data, axis=None), np.fmax.reduce(data, axis=None)
    return (
        valid,
        float(low),
        float(high),
        int(np.count_nonzero(data == low)),
        int(np.count_nonzero(data == high)),
    )


def _other_within(
    data: NDArray[np.floating], near: tuple[float, float], value: float, *, compiled: bool
) -> bool:
    """Whether a value of data other than ``value`` lies within ``near`` (inclusive)."""
    if compiled:
        return kernels.other_within(data, near[0], near[1], value)
    with np.errstate(invalid="ignore"):  # boolean masks only: the heights are not copied
        return bool(np.any((data >= near[0]) & (data <= near[1]) & (data != value)))


def format_value(value: float) -> str:
    """A value as the user would write it in the spec (integers without '.0', floats exact)."""
    if math.isfinite(value) and value.is_integer() and abs(value) < 1e15:
        return str(int(value))
    return repr(value)


def read_mosaic(
    tiles: Sequence[TileInfo],
    bounds: tuple[float, float, float, float],
    *,
    nodata: float | None = None,
    units: str | None = None,
    margin_px: int = 3,
    role: str = "reference",
    keep_float32: bool = False,
) -> tuple[NDArray[np.floating], Grid]:
    """Mosaic the parts of tiles (all on one grid) that cover bounds (in their CRS), plus a margin.

    Returns the values (NaN where no tile or nodata) and the mosaic's grid, snapped to the tiles'
    own pixel grid so no resampling happens here. Raises TileReadError when a tile cannot be read
    or the tiles are not on one grid. With ``units`` (heights; None for land cover) the part read
    of each tile is checked as in read_tile: ImplausibleHeightsError names the ``role`` tile.
    With ``keep_float32`` and every tile float32, the mosaic is float32 (the same values).
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
    as_read = keep_float32 and all(t.dtype == "float32" for t in tiles)
    out = np.full((row1 - row0, col1 - col0), np.nan, dtype=np.float32 if as_read else np.float64)
    empty = True  # nothing pasted yet: the first tile is written straight into out
    for tile in tiles:
        block = _paste(tile, out, row0=row0, col0=col0, reference=first, nodata=nodata, empty=empty)
        if block is not None and units is not None:
            check_heights(block, tile_id=tile.tile_id, units=units, role=role)
        empty = empty and block is None
    grid = Grid(first.crs, (a, 0.0, c + col0 * a, 0.0, e, f + row0 * e), col1 - col0, row1 - row0)
    return out, grid


def _paste(
    tile: TileInfo,
    out: NDArray[np.floating],
    *,
    row0: int,
    col0: int,
    reference: Grid,
    nodata: float | None,
    empty: bool = False,
) -> NDArray[np.floating] | None:
    """Copy the part of tile that falls inside out (whose pixel (0, 0) is (row0, col0) of the
    reference grid) where out is still NaN; return that part (None when the tile does not reach
    into out). ``empty``: out is all NaN, so the part is copied in whole (converted on the read
    block when it has out's type, else straight into out)."""
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
        return None
    window = Window(c0 - tile_c0, r0 - tile_r0, c1 - c0, r1 - r0)  # type: ignore[call-arg]
    raw = _read_band(tile, "reference tile", window)
    target = out[r0:r1, c0:c1]
    if empty and raw.dtype == out.dtype:
        # voids set and values checked on the read block (contiguous: about 2.5x faster than on
        # the part of out it fills), then one copy into out
        block = _voids_to_nan(raw, (tile.nodata, nodata), out=cast("NDArray[np.floating]", raw))
        target[...] = block
        return block
    if empty:
        return _voids_to_nan(raw, (tile.nodata, nodata), out=target)
    block = _voids_to_nan(raw, (tile.nodata, nodata))
    np.copyto(target, block, where=np.isnan(target))
    return block


def _read_band(tile: TileInfo, what: str, window: Window | None) -> NDArray[np.generic]:
    """Band 1 of the tile (or a window of it), opened confined to the tile's data roots
    (workers/inputs/confine.py): DataRootError when the file now leads outside them, TileReadError
    when it cannot be read; messages name the tile, never a server path."""
    try:
        opened = open_confined(tile.path, tile.roots)
    except DataRootError as exc:
        raise DataRootError(f"{what} {tile.tile_id}: {exc}") from None
    except OSError as exc:
        raise TileReadError(f"{what} {tile.tile_id} cannot be read: {exc.strerror}") from None
    with opened:
        shape = (tile.grid.height, tile.grid.width)
        fast = read_band(opened.fd, shape, None if window is None else _pixels(window))
        if fast is not None:  # the common layouts, without GDAL (workers/inputs/tiff_blocks.py)
            return fast
        try:
            with opened.raster() as src:
                return src.read(1, window=window)  # type: ignore[no-any-return]
        except (RasterioError, OSError) as exc:
            reason = opened.clean(str(exc))
            raise TileReadError(f"{what} {tile.tile_id} cannot be read: {reason}") from None


def _pixels(window: Window) -> tuple[int, int, int, int]:
    """window as (row offset, column offset, rows, columns)."""
    return int(window.row_off), int(window.col_off), int(window.height), int(window.width)


def _is_whole(value: float, tol: float = 1e-6) -> bool:
    return abs(value - round(value)) < tol


def _voids_to_nan(
    raw: NDArray[np.generic],
    nodata: Sequence[float | None],
    *,
    out: NDArray[np.floating] | None = None,
) -> NDArray[np.floating]:
    """raw as float64 with every nodata value NaN (written into ``out`` when given, else a new
    array; ``out`` may be raw itself). Each value is compared in raw's own type (a spec's 0.1
    matches a float32 file's 0.1; a fractional value never matches integers)."""
    data: NDArray[np.floating]
    if out is None:
        data = raw.astype(np.float64)
    else:
        data = out
        if out is not raw:
            np.copyto(data, raw, casting="unsafe")
    for value in dict.fromkeys(v for v in nodata if v is not None):
        if np.issubdtype(raw.dtype, np.integer):
            info = np.iinfo(str(raw.dtype))
            if not (float(value).is_integer() and info.min <= value <= info.max):
                continue
        with np.errstate(over="ignore"):
            data[raw == raw.dtype.type(value)] = np.nan
    return data
