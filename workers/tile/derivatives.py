"""Derived terrain parameters of a height grid, and their differences test - reference (pure).

Heights in metres on a north-up grid, pixels ``pixel_size_x_m`` wide (east) and
``pixel_size_y_m`` tall (north), rows running southwards; NaN = no height. Every parameter is
read from the 3 x 3 window around a pixel (z1 z2 z3 / z4 z5 z6 / z7 z8 z9, z1 north-west):

- slope and aspect: Horn (1981), the weighted differences
  dz/dx = ((z3 + 2 z6 + z9) - (z1 + 2 z4 + z7)) / (8 dx), dz/dy = ((z1 + 2 z2 + z3) -
  (z7 + 2 z8 + z9)) / (8 dy) (y north). Chosen for slope and aspect because its 8-neighbour
  weighting averages noise across three rows (or columns), so a noisy model's slope is less
  inflated than with 2-neighbour differences (common practice).
- plan and profile curvature: the derivatives of Zevenbergen & Thorne (1987)'s partial quartic
  through the 9 heights, p = (z6 - z4) / (2 dx), q = (z2 - z8) / (2 dy), r = (z4 - 2 z5 + z6) /
  dx^2, t = (z2 - 2 z5 + z8) / dy^2, s = (z3 - z1 + z7 - z9) / (4 dx dy) (Horn's scheme gives no
  second derivatives), in the geometric definitions (as collected by Florinsky 2016, Digital
  Terrain Analysis in Soil Science and Geology, ch. 2; from memory, checked here against a
  sphere, see the tests):
  profile curvature = -(p^2 r + 2 p q s + q^2 t) / ((p^2 + q^2) (1 + p^2 + q^2)^(3/2)), the
  curvature of the surface along the steepest slope;
  plan curvature = -(q^2 r - 2 p q s + p^2 t) / (p^2 + q^2)^(3/2), the curvature of the contour.
  Sign: positive where the surface is convex (on a sphere cap of radius R: profile curvature
  1/R, plan curvature 1/rho at horizontal distance rho from its axis). Returned in 1/m; the
  differences are reported in 1/km (CURVATURE_PER_KM).
- D8 flow direction: the neighbour of steepest descent (drop / distance, diagonals at
  hypot(dx, dy)), coded 1..8 clockwise from north (N, NE, E, SE, S, SW, W, NW), 0 when no
  neighbour is lower; a tie goes to the first in that order.

Edges: a pixel whose 3 x 3 window is not complete (the outermost row and column of the grid, or
a NaN height in the window) gets NaN (D8: NO_WINDOW). The tile pass reads no halo around a test
tile, so the border pixels of every tile are left out of the derived statistics.

surface_derivatives computes everything in one compiled sweep (derivative_kernels.py) when
numba is installed; the numpy functions here are its reference (tested equal).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.tile import derivative_kernels

SLOPE = "slope"
ASPECT = "aspect"
PLAN_CURVATURE = "plan_curvature"
PROFILE_CURVATURE = "profile_curvature"
PARAMETERS = (SLOPE, ASPECT, PLAN_CURVATURE, PROFILE_CURVATURE)
UNITS = {SLOPE: "degree", ASPECT: "degree", PLAN_CURVATURE: "1/km", PROFILE_CURVATURE: "1/km"}
CURVATURE_PER_KM = 1000.0  # 1/m -> 1/km
NO_WINDOW = 255  # D8 code of a pixel without a complete 3 x 3 window
#: D8 neighbours clockwise from north: (row offset, column offset); code = position + 1.
D8_OFFSETS = ((-1, 0), (-1, 1), (0, 1), (1, 1), (1, 0), (1, -1), (0, -1), (-1, -1))

Grid = NDArray[np.float64]


@dataclass(frozen=True, eq=False)
class SurfaceDerivatives:
    """The derived parameters of one surface, each on the input grid (NaN without a window):
    slope and aspect in degrees (aspect clockwise from north, the downslope direction, NaN on
    flat ground), curvatures in 1/m, D8 codes (see the module docstring)."""

    slope_deg: Grid
    aspect_deg: Grid
    plan_curvature: Grid
    profile_curvature: Grid
    d8: NDArray[np.uint8]


def windows(z: Grid) -> tuple[Grid, ...]:
    """The nine views z1..z9 of the interior pixels' 3 x 3 windows (z1 north-west, z5 the pixel),
    each of shape (rows - 2, cols - 2)."""
    return tuple(
        z[r : z.shape[0] - 2 + r, c : z.shape[1] - 2 + c] for r in range(3) for c in range(3)
    )


def _on_grid(interior: Grid, shape: tuple[int, ...]) -> Grid:
    """interior values placed in a NaN-filled grid of shape (border left NaN)."""
    out = np.full(shape, np.nan)
    out[1:-1, 1:-1] = interior
    return out


def horn_gradient(
    heights: Grid, *, pixel_size_x_m: float, pixel_size_y_m: float
) -> tuple[Grid, Grid]:
    """dz/d(east) and dz/d(north) by Horn (1981); NaN without a complete window."""
    z = np.asarray(heights, dtype=np.float64)
    if min(z.shape) < 3:
        return np.full(z.shape, np.nan), np.full(z.shape, np.nan)
    z1, z2, z3, z4, z5, z6, z7, z8, z9 = windows(z)
    east = ((z3 + 2 * z6 + z9) - (z1 + 2 * z4 + z7)) / (8 * pixel_size_x_m)
    north = ((z1 + 2 * z2 + z3) - (z7 + 2 * z8 + z9)) / (8 * pixel_size_y_m)
    missing = np.isnan(z5)  # Horn's differences leave the centre out: it must exist too
    east[missing] = np.nan
    north[missing] = np.nan
    return _on_grid(east, z.shape), _on_grid(north, z.shape)


def slope_from_gradient(east: Grid, north: Grid) -> Grid:
    """Slope in degrees from the gradient."""
    return np.degrees(np.arctan(np.hypot(east, north)))  # type: ignore[no-any-return]


def aspect_from_gradient(east: Grid, north: Grid) -> Grid:
    """Aspect: the downslope direction in degrees clockwise from north, in [0, 360); NaN where
    the gradient is zero (no direction)."""
    aspect = np.degrees(np.arctan2(-east, -north)) % 360.0
    aspect[(east == 0) & (north == 0)] = np.nan
    return aspect  # type: ignore[no-any-return]


def second_derivatives(
    heights: Grid, *, pixel_size_x_m: float, pixel_size_y_m: float
) -> tuple[Grid, Grid, Grid, Grid, Grid]:
    """p, q, r, s, t of Zevenbergen & Thorne (1987) (x east, y north) on the interior pixels
    (shape (rows - 2, cols - 2)); NaN where the window holds a NaN."""
    z1, z2, z3, z4, z5, z6, z7, z8, z9 = windows(np.asarray(heights, dtype=np.float64))
    dx, dy = pixel_size_x_m, pixel_size_y_m
    p = (z6 - z4) / (2 * dx)
    q = (z2 - z8) / (2 * dy)
    r = (z4 - 2 * z5 + z6) / (dx * dx)
    t = (z2 - 2 * z5 + z8) / (dy * dy)
    s = (z3 - z1 + z7 - z9) / (4 * dx * dy)
    return p, q, r, s, t


def curvatures(heights: Grid, *, pixel_size_x_m: float, pixel_size_y_m: float) -> tuple[Grid, Grid]:
    """Plan and profile curvature in 1/m (module docstring), NaN without a complete window or
    where the surface is level (no direction of slope)."""
    z = np.asarray(heights, dtype=np.float64)
    if min(z.shape) < 3:
        return np.full(z.shape, np.nan), np.full(z.shape, np.nan)
    p, q, r, s, t = second_derivatives(
        z, pixel_size_x_m=pixel_size_x_m, pixel_size_y_m=pixel_size_y_m
    )
    g2 = p * p + q * q
    with np.errstate(divide="ignore", invalid="ignore"):
        along = p * p * r + 2 * p * q * s + q * q * t
        across = q * q * r - 2 * p * q * s + p * p * t
        profile = -along / (g2 * ((1 + g2) * np.sqrt(1 + g2)))
        plan = -across / (g2 * np.sqrt(g2))
    level = g2 == 0
    profile[level] = np.nan
    plan[level] = np.nan
    return _on_grid(plan, z.shape), _on_grid(profile, z.shape)


def d8_directions(
    heights: Grid, *, pixel_size_x_m: float, pixel_size_y_m: float
) -> NDArray[np.uint8]:
    """D8 flow direction codes (module docstring): 1..8 clockwise from north, 0 when no
    neighbour is lower, NO_WINDOW without a complete window."""
    z = np.asarray(heights, dtype=np.float64)
    codes = np.full(z.shape, NO_WINDOW, dtype=np.uint8)
    if min(z.shape) < 3:
        return codes
    views = windows(z)
    centre = views[4]
    best = np.zeros(centre.shape)
    code = np.zeros(centre.shape, dtype=np.uint8)
    diagonal = float(np.hypot(pixel_size_x_m, pixel_size_y_m))
    for k, (dr, dc) in enumerate(D8_OFFSETS):
        distance = diagonal if dr and dc else (pixel_size_y_m if dr else pixel_size_x_m)
        drop = (centre - views[(dr + 1) * 3 + dc + 1]) / distance
        steeper = drop > best  # strictly: a tie keeps the earlier direction
        best = np.where(steeper, drop, best)
        code[steeper] = k + 1
    complete = np.isfinite(np.sum(np.stack(views), axis=0))
    codes[1:-1, 1:-1] = np.where(complete, code, NO_WINDOW)
    return codes


def surface_derivatives(
    heights: NDArray[np.floating],
    *,
    pixel_size_x_m: float,
    pixel_size_y_m: float,
    compiled: bool = True,
) -> SurfaceDerivatives:
    """Every derived parameter of one surface (see SurfaceDerivatives), in one compiled sweep
    when numba is there (``compiled=False``: the numpy functions above, always)."""
    z = np.ascontiguousarray(heights, dtype=np.float64)
    if compiled and derivative_kernels.AVAILABLE and min(z.shape) >= 3:
        nan = np.full(z.shape, np.nan)
        out = SurfaceDerivatives(
            nan, nan.copy(), nan.copy(), nan.copy(), np.full(z.shape, NO_WINDOW, dtype=np.uint8)
        )
        derivative_kernels.surface_sweep(
            z,
            float(pixel_size_x_m),
            float(pixel_size_y_m),
            out.slope_deg,
            out.aspect_deg,
            out.plan_curvature,
            out.profile_curvature,
            out.d8,
        )
        return out
    size = {"pixel_size_x_m": pixel_size_x_m, "pixel_size_y_m": pixel_size_y_m}
    east, north = horn_gradient(z, **size)
    plan, profile = curvatures(z, **size)
    return SurfaceDerivatives(
        slope_from_gradient(east, north),
        aspect_from_gradient(east, north),
        plan,
        profile,
        d8_directions(z, **size),
    )


def circular_difference_deg(test: Grid, reference: Grid) -> Grid:
    """test - reference of two directions in degrees, wrapped to (-180, 180] (359 vs 1: -2)."""
    wrapped = 180.0 - np.mod(180.0 - (np.asarray(test) - np.asarray(reference)), 360.0)
    return wrapped  # type: ignore[no-any-return]


def derived_differences(
    test: SurfaceDerivatives,
    reference: SurfaceDerivatives,
    *,
    parameters: Sequence[str] = PARAMETERS,
    min_slope_deg: float,
) -> dict[str, Grid]:
    """test - reference of each parameter asked for, in UNITS (NaN where either has none).

    Aspect and plan curvature (both follow the contour's direction, which flat ground lacks) are
    compared only where the reference slope exceeds ``min_slope_deg``.
    """
    steep = reference.slope_deg > min_slope_deg
    out: dict[str, Grid] = {}
    for name in parameters:
        if name == SLOPE:
            out[name] = test.slope_deg - reference.slope_deg
        elif name == ASPECT:
            out[name] = circular_difference_deg(test.aspect_deg, reference.aspect_deg)
        elif name == PLAN_CURVATURE:
            out[name] = (test.plan_curvature - reference.plan_curvature) * CURVATURE_PER_KM
        elif name == PROFILE_CURVATURE:
            out[name] = (test.profile_curvature - reference.profile_curvature) * CURVATURE_PER_KM
        else:
            raise ValueError(f"unknown derived parameter {name!r}; known: {', '.join(PARAMETERS)}")
        if name in (ASPECT, PLAN_CURVATURE):
            out[name] = np.where(steep, out[name], np.nan)
    return out


def d8_compared(
    test: SurfaceDerivatives, reference: SurfaceDerivatives
) -> tuple[NDArray[np.bool_], NDArray[np.bool_]]:
    """Where the D8 directions are compared (both windows complete) and where they agree."""
    compared = (test.d8 != NO_WINDOW) & (reference.d8 != NO_WINDOW)
    return compared, compared & (test.d8 == reference.d8)
