"""Slope and aspect of a height grid (pure).

Heights in metres on a north-up grid with pixels pixel_size_x_m wide (east) and pixel_size_y_m
tall (north); rows run southwards. NaN propagates to the neighbouring slopes.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray


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
