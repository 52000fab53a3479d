"""Slope and aspect of a height grid (pure).

Heights in metres on a north-up grid with pixels pixel_size_x_m wide (east) and pixel_size_y_m
tall (north); rows run southwards. NaN propagates to the neighbouring slopes.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.tile import kernels


def gradient_east_north(
    heights: NDArray[np.float64], *, pixel_size_x_m: float, pixel_size_y_m: float
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """dz/d(east) and dz/d(north) by central differences (one-sided at the edges)."""
    if min(heights.shape) < 2:
        nan = np.full(heights.shape, np.nan)
        return nan, nan.copy()
    dz_drow, dz_dcol = np.gradient(heights, pixel_size_y_m, pixel_size_x_m)
    return np.asarray(dz_dcol), -np.asarray(dz_drow)


def slope_degrees(
    heights: NDArray[np.float64], *, pixel_size_x_m: float, pixel_size_y_m: float
) -> NDArray[np.float64]:
    """Slope in degrees."""
    de, dn = gradient_east_north(
        heights, pixel_size_x_m=pixel_size_x_m, pixel_size_y_m=pixel_size_y_m
    )
    return np.degrees(np.arctan(np.hypot(de, dn)))


def aspect_degrees(
    heights: NDArray[np.float64], *, pixel_size_x_m: float, pixel_size_y_m: float
) -> NDArray[np.float64]:
    """Aspect: the downslope direction in degrees clockwise from north, in [0, 360)."""
    de, dn = gradient_east_north(
        heights, pixel_size_x_m=pixel_size_x_m, pixel_size_y_m=pixel_size_y_m
    )
    return np.degrees(np.arctan2(-de, -dn)) % 360.0


def slope_bands(
    heights: NDArray[np.floating],
    edges: Sequence[float],
    *,
    pixel_size_x_m: float,
    pixel_size_y_m: float,
    in_float64: bool = False,
) -> NDArray[np.uint8]:
    """Slope band of each pixel: ``b`` where ``edges[b] <= slope < edges[b + 1]`` (the last band
    open above), ``len(edges)`` where the slope is NaN or below ``edges[0]``.

    Heights may be float32 or float64. The same bands as
    ``np.digitize(slope_degrees(heights), edges) - 1`` on finite slopes, pixel for pixel,
    without the arctangent: the squared gradient is compared with tan(edge)^2, and the
    few pixels within a relative 1e-6 of a threshold are decided by the exact slope_degrees
    arithmetic. Edges must increase and lie in [0, 90] degrees. With ``in_float64``, float32
    heights get the bands of the float64 values they hold (``heights.astype(np.float64)``)
    without that copy.
    """
    edge_arr = np.asarray(edges, dtype=np.float64)
    if edge_arr.size == 0 or edge_arr[0] < 0 or edge_arr[-1] > 90 or np.any(np.diff(edge_arr) <= 0):
        raise ValueError(f"slope band edges must increase within [0, 90] degrees: {list(edges)}")
    none = np.uint8(edge_arr.size)
    if min(heights.shape) < 2:
        return np.full(heights.shape, none, dtype=np.uint8)
    wide = in_float64 or heights.dtype != np.float32
    if wide and heights.dtype == np.float32 and not kernels.AVAILABLE:
        heights = heights.astype(np.float64)  # the numpy path subtracts in the input's type
    margin = _MARGIN if wide else _MARGIN_FLOAT32
    t2 = np.tan(np.radians(edge_arr)) ** 2
    lower, upper = t2 * (1 - margin), t2 * (1 + margin)
    if kernels.AVAILABLE and heights.dtype in (np.float32, np.float64):
        bands = np.empty(heights.shape, dtype=np.uint8)
        px, py = float(pixel_size_x_m), float(pixel_size_y_m)
        kernels.band_sweep(heights, 0.5 / px, 0.5 / py, 1 / px, 1 / py, lower, upper, none, bands)
        (close,) = np.nonzero((bands == kernels.AMBIGUOUS).ravel())
    else:
        bands, close = _bands_numpy(heights, lower, upper, none, pixel_size_x_m, pixel_size_y_m)
    if close.size:
        exact = _exact_slope_at(heights, close, pixel_size_x_m, pixel_size_y_m, wide=wide)
        counted = np.zeros(close.size, dtype=np.int16)
        for edge in edge_arr:
            counted += exact >= edge
        bands.ravel()[close] = np.where(counted > 0, counted - 1, none)
    return bands


def _bands_numpy(
    heights: NDArray[np.floating],
    lower: NDArray[np.float64],
    upper: NDArray[np.float64],
    none: np.uint8,
    px: float,
    py: float,
) -> tuple[NDArray[np.uint8], NDArray[np.intp]]:
    """slope_bands without the compiled loop: the bands, and the flat indices of the pixels
    too close to an edge to tell (their band is left for the exact path)."""
    g2 = _squared_gradient(heights, px, py)
    surely = np.zeros(g2.shape, dtype=np.uint8)  # edges certainly at or below the slope
    maybe = np.zeros(g2.shape, dtype=np.uint8)  # edges possibly at or below it
    for low, high in zip(lower, upper, strict=True):
        surely += g2 >= np.float32(high)  # float32 rounding << margin
        maybe += g2 >= np.float32(low)
    del g2
    (close,) = np.nonzero((surely != maybe).ravel())
    # count of edges at or below the slope, minus one, is the band; none when no edge is below
    surely -= 1
    surely[surely == 255] = none
    return surely, close


_MARGIN = 1e-6  # relative: far above float32 rounding of the squared gradient (6e-8)
_MARGIN_FLOAT32 = 1e-4  # the exact path then computes in float32, as np.gradient does


def _squared_gradient(heights: NDArray[np.floating], px: float, py: float) -> NDArray[np.float32]:
    """|grad z|^2 from central differences (one-sided at the edges), as float32 (to within a
    relative 1e-7)."""
    rows, cols = heights.shape
    gx = np.empty((rows, cols), dtype=np.float64)
    np.subtract(heights[:, 2:], heights[:, :-2], out=gx[:, 1:-1])
    gx *= 0.5 / px
    np.subtract(heights[:, 1], heights[:, 0], out=gx[:, 0])
    np.subtract(heights[:, -1], heights[:, -2], out=gx[:, -1])
    gx[:, 0] /= px
    gx[:, -1] /= px
    gy = np.empty((rows, cols), dtype=np.float64)
    np.subtract(heights[2:], heights[:-2], out=gy[1:-1])
    gy *= 0.5 / py
    np.subtract(heights[1], heights[0], out=gy[0])
    np.subtract(heights[-1], heights[-2], out=gy[-1])
    gy[0] /= py
    gy[-1] /= py
    np.multiply(gx, gx, out=gx)
    np.multiply(gy, gy, out=gy)
    g2 = np.empty((rows, cols), dtype=np.float32)  # compared a few times: half the bytes
    np.add(gx, gy, out=g2, casting="same_kind")
    return g2


def _exact_slope_at(
    heights: NDArray[np.floating], flat: NDArray[np.intp], px: float, py: float, *, wide: bool
) -> NDArray[np.float64]:
    """slope_degrees at the flat indices given, with np.gradient's arithmetic (in float64 when
    ``wide``, else in the heights' own float type)."""
    rows, cols = heights.shape
    r, c = np.divmod(flat, cols)
    z = heights if np.issubdtype(heights.dtype, np.floating) else heights.astype(np.float64)
    as_type = np.float64 if wide else z.dtype
    de = _one_axis(z, r, c, axis=1, n=cols, step=px, as_type=as_type)
    dn = _one_axis(z, r, c, axis=0, n=rows, step=py, as_type=as_type)
    return np.degrees(np.arctan(np.hypot(de, dn)))  # type: ignore[no-any-return]


def _one_axis(
    z: NDArray[np.floating],
    r: NDArray[np.intp],
    c: NDArray[np.intp],
    *,
    axis: int,
    n: int,
    step: float,
    as_type: type | np.dtype,
) -> NDArray[np.floating]:
    """np.gradient along one axis at (r, c): (z[+1] - z[-1]) / (2 step) inside, one-sided at
    the edges."""
    i = r if axis == 0 else c
    lo = np.maximum(i - 1, 0)
    hi = np.minimum(i + 1, n - 1)
    at_hi = (r, hi) if axis == 1 else (hi, c)
    at_lo = (r, lo) if axis == 1 else (lo, c)
    diff = z[at_hi].astype(as_type) - z[at_lo].astype(as_type)
    inside = (i > 0) & (i < n - 1)
    out = np.empty(diff.shape, dtype=as_type)  # np.gradient's output type, then its cast
    out[inside] = diff[inside] / (2.0 * step)
    out[~inside] = diff[~inside] / step
    return out
