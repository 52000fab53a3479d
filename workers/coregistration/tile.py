"""Co-registration on one tile: estimate, build mergeable equations for the job estimate, and
apply a correction (pure: arrays on the tile's grid in, arrays or small values out).

A correction never resamples the test model: its pixels are audited as delivered. The horizontal
shift moves the reference instead, folded into the one resampling the reference gets onto the
test grid (:func:`reference_grid` is the grid to resample it onto); bias, tilt and elevation
terms are then subtracted from dh.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.coregistration.estimate import (
    LinearFit,
    elevation_fit,
    nuth_kaab,
    nuth_kaab_fit,
    plane_fit,
    sample_shifted,
    solve,
    stable_pixels,
)
from demaudit.workers.errors import CannotEstimateError
from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.stats.summary import DhSummary
from demaudit.workers.tile.grid import Grid
from demaudit.workers.tile.strata import ClassInfo
from demaudit.workers.tile.terrain import aspect_degrees, slope_degrees


@dataclass(frozen=True)
class Correction:
    """A systematic error model to remove from dh (metres): the test model's features sit
    (east, north) from the reference's, so each test pixel at x is compared with the reference
    at x - (east, north); then a vertical bias, a planar tilt about (origin_east, origin_north)
    (dh per metre east / north) and a bias per metre of elevation about elevation_origin are
    subtracted."""

    east_m: float = 0.0
    north_m: float = 0.0
    vertical_m: float = 0.0
    tilt_east: float = 0.0
    tilt_north: float = 0.0
    origin_east: float = 0.0
    origin_north: float = 0.0
    elevation_slope: float = 0.0
    elevation_origin: float = 0.0


def reference_grid(grid: Grid, *, east_m: float, north_m: float) -> Grid:
    """The test grid moved by -(east_m, north_m): its pixel (row, col) centre is the test
    pixel's centre minus the shift, i.e. where the reference must be sampled for that pixel.

    The shift is in metres; on a geographic grid it becomes degrees through the pixel size in
    metres at the grid's centre latitude (as ``Grid.pixel_size_m``)."""
    if not (east_m or north_m):
        return grid
    px, py = grid.pixel_size_m()
    res_x, res_y = grid.resolution
    a, b, c, d, e, f = grid.transform
    return replace(grid, transform=(a, b, c - east_m * res_x / px, d, e, f - north_m * res_y / py))


def moved_reference(
    reference: NDArray[np.float64], grid: Grid, *, east_m: float, north_m: float
) -> NDArray[np.float64]:
    """The reference (already on grid) sampled at x - (east_m, north_m), bilinear, in memory:
    for estimates only (a second interpolation of the reference); corrected statistics resample
    the reference once onto :func:`reference_grid` instead."""
    px, py = grid.pixel_size_m()
    return sample_shifted(
        reference, east_m=-east_m, north_m=-north_m, pixel_size_x_m=px, pixel_size_y_m=py
    )


def corrected_dh(
    test: NDArray[np.float64], reference: NDArray[np.float64], grid: Grid, c: Correction
) -> NDArray[np.float64]:
    """dh after removing the correction c (metres on grid, one datum).

    ``test`` is the test model as delivered; ``reference`` must already be the reference at
    x - (c.east_m, c.north_m), i.e. resampled onto ``reference_grid(grid, ...)`` of c's shift.
    The elevation term uses those reference heights.
    """
    dh = test - reference - c.vertical_m
    if c.tilt_east or c.tilt_north:
        x, y = grid.centre_coordinates()
        dh -= c.tilt_east * (x - c.origin_east) + c.tilt_north * (y - c.origin_north)
    if c.elevation_slope:
        dh -= c.elevation_slope * (reference - c.elevation_origin)
    return dh


def cover_ok(
    landcover: NDArray[np.float64] | None, classes: Sequence[ClassInfo]
) -> NDArray[np.bool_] | None:
    """Pixels on non-vegetated classes (None without land cover: every pixel may be stable)."""
    if landcover is None or not classes:
        return None
    return np.isin(landcover, [c.value for c in classes if c.group == "non_vegetated"])


@dataclass(frozen=True, eq=False)
class TileEquations:
    """One tile's contribution to a job-wide estimate at a given correction (mergeable)."""

    shift: LinearFit = field(default_factory=lambda: LinearFit.empty(3))
    plane: LinearFit = field(default_factory=lambda: LinearFit.empty(3))
    elevation: LinearFit = field(default_factory=lambda: LinearFit.empty(2))
    stable_dh: DhSummary = field(default_factory=dh_summary.empty)
    regions: Mapping[str, LinearFit] = field(default_factory=dict)

    def merge(self, other: TileEquations) -> TileEquations:
        regions = dict(self.regions)
        for key, fit in other.regions.items():
            regions[key] = regions[key].merge(fit) if key in regions else fit
        return TileEquations(
            self.shift.merge(other.shift),
            self.plane.merge(other.plane),
            self.elevation.merge(other.elevation),
            dh_summary.merge(self.stable_dh, other.stable_dh),
            regions,
        )


def tile_equations(
    test: NDArray[np.float64],
    reference: NDArray[np.float64],
    grid: Grid,
    *,
    at: Correction,
    cover: NDArray[np.bool_] | None,
    region_masks: Mapping[str, NDArray[np.bool_]] = {},  # noqa: B006 - read only
) -> TileEquations:
    """Normal equations of the shift, tilt and elevation fits for dh at the shift of ``at``.

    ``reference`` must be the reference at x - ``at``'s shift (resampled onto
    ``reference_grid(grid, ...)``); slope and aspect are taken from it, where the residual shift
    is linearised. Each tile's own median dh is removed before the shift fit (a bias, even a
    local one, must not pull the shift); plane and elevation fits use coordinates relative to
    ``at``'s origins.
    """
    px, py = grid.pixel_size_m()
    slope = slope_degrees(reference, pixel_size_x_m=px, pixel_size_y_m=py)
    aspect = aspect_degrees(reference, pixel_size_x_m=px, pixel_size_y_m=py)
    dh = test - reference
    stable = stable_pixels(dh, slope, cover_ok=cover)
    if not stable.any():
        return TileEquations()
    local = dh - float(np.median(dh[stable]))
    x, y = grid.centre_coordinates()
    return TileEquations(
        shift=nuth_kaab_fit(local, slope, aspect, stable),
        plane=plane_fit(dh, x - at.origin_east, y - at.origin_north, stable),
        elevation=elevation_fit(dh, reference, stable, origin_m=at.elevation_origin),
        stable_dh=dh_summary.summarise(dh[stable]),
        regions={
            key: nuth_kaab_fit(local, slope, aspect, stable & m) for key, m in region_masks.items()
        },
    )


def tile_estimate(
    test: NDArray[np.float64],
    reference: NDArray[np.float64],
    grid: Grid,
    *,
    cover: NDArray[np.bool_] | None,
    max_iterations: int,
    tolerance_px: float,
) -> dict[str, Any]:
    """The tile's own Nuth & Kääb shift and its planar tilt after that shift (a record for the
    outputs; status 'cannot_estimate' with the reason when the terrain does not allow it).

    Test and reference on the tile's grid; the reference is moved in memory while estimating."""
    px, py = grid.pixel_size_m()
    slope = slope_degrees(reference, pixel_size_x_m=px, pixel_size_y_m=py)
    aspect = aspect_degrees(reference, pixel_size_x_m=px, pixel_size_y_m=py)
    try:
        est = nuth_kaab(
            test,
            reference,
            slope,
            aspect,
            pixel_size_x_m=px,
            pixel_size_y_m=py,
            cover_ok=cover,
            max_iterations=max_iterations,
            tolerance_px=tolerance_px,
        )
        x, y = grid.centre_coordinates()
        cx, cy = float(x.mean()), float(y.mean())
        moved = moved_reference(reference, grid, east_m=est.east_m, north_m=est.north_m)
        dh = test - moved
        stable = stable_pixels(dh, slope, cover_ok=cover)
        tilt = solve(plane_fit(dh, x - cx, y - cy, stable), what="tilt")
    except CannotEstimateError as exc:
        return {"status": "cannot_estimate", "reason": str(exc)}
    return {
        "status": "ok",
        "east_m": est.east_m,
        "north_m": est.north_m,
        "vertical_m": est.vertical_m,
        "east_se_m": est.east_se_m,
        "north_se_m": est.north_se_m,
        "tilt_east_m_per_km": tilt.beta[1] * 1000.0,
        "tilt_north_m_per_km": tilt.beta[2] * 1000.0,
        "iterations": est.iterations,
        "converged": est.converged,
        "stable_pixels": est.stable_pixels,
        "nmad_stable_before_m": est.nmad_before_m,
        "nmad_stable_after_m": est.nmad_after_m,
    }


def correction_from_record(record: Mapping[str, Any], *, fit_tilt: bool) -> Correction | None:
    """A tile's own correction from its tile_estimate record (None when it could not estimate).

    The tilt is about the tile's centre, which the caller fills in."""
    if record.get("status") != "ok":
        return None
    c = Correction(
        east_m=record["east_m"], north_m=record["north_m"], vertical_m=record["vertical_m"]
    )
    if fit_tilt:
        c = replace(
            c,
            tilt_east=record["tilt_east_m_per_km"] / 1000.0,
            tilt_north=record["tilt_north_m_per_km"] / 1000.0,
        )
    return c
