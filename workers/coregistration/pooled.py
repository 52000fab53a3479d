"""The pooled job-wide co-registration estimate (pure): repeated passes, each returning the
mergeable normal equations of all stable pixels at the current correction, until the shift
update is below the tolerance.

The passes themselves are a callable (``run_pass(at) -> TileEquations``): on a cluster
service/run/coregistration.py fans them out over the tiles; a test passes a function of
synthetic surfaces.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, replace
from typing import Any

import numpy as np

from demaudit.workers.coregistration.estimate import (
    MAX_STANDARD_ERROR_PX,
    FitResult,
    solve,
)
from demaudit.workers.coregistration.job import JobEstimate
from demaudit.workers.coregistration.tile import Correction, TileEquations
from demaudit.workers.errors import CannotEstimateError
from demaudit.workers.stats.quantiles import quantile

#: One pass over the sampled tiles at a correction: their merged equations.
Pass = Callable[[Correction], TileEquations]

#: A region's one-step update larger than this (pixels) is not trusted.
MAX_REGION_UPDATE_PX = 2.0


@dataclass(frozen=True)
class PooledSettings:
    """What the pooled estimate iterates with (from the spec's coregistration section)."""

    max_iterations: int
    tolerance_px: float
    fit_tilt: bool
    fit_elevation_bias: bool


def pooled_estimate(
    run_pass: Pass, at: Correction, *, pixel_m: float, settings: PooledSettings
) -> JobEstimate:
    """Iterate the horizontal shift from ``at`` (pixel_m: the finest tile pixel, metres), then
    fit the vertical bias, and optionally tilt and elevation-dependent bias, on a last pass."""
    try:
        at, fit, history, converged = _iterate(run_pass, at, pixel_m, settings)
        equations = run_pass(at)
    except CannotEstimateError as exc:
        return JobEstimate(
            None, {"status": "cannot_estimate", "reason": str(exc), "method": "pooled"}
        )
    at = replace(at, vertical_m=float(quantile(equations.stable_dh, 0.5)))
    report: dict[str, Any] = {
        "status": "ok",
        "method": "Nuth & Kääb (2011), iterated on all stable pixels of the tiles used",
        "stable_pixels": equations.shift.n,
        "iterations": len(history),
        "converged": converged,
        "east_m": at.east_m,
        "north_m": at.north_m,
        "vertical_m": at.vertical_m,
        "east_se_m": fit.standard_error(1),
        "north_se_m": fit.standard_error(0),
        "standard_error_note": "from the fit's residuals; pixels are spatially correlated, so "
        "the spread of the per-tile estimates is the more honest uncertainty",
        "history": history,
    }
    at = with_optional_fits(at, equations, settings, report)
    report["regions"] = region_shifts(equations, at, pixel_m)
    return JobEstimate(at, report)


def _iterate(
    run_pass: Pass, at: Correction, pixel_m: float, settings: PooledSettings
) -> tuple[Correction, FitResult, list[dict[str, float]], bool]:
    """The shift iterations: the correction reached, the last fit, the history, convergence."""
    history = []
    fit: FitResult | None = None
    for _ in range(settings.max_iterations):
        fit = solve(run_pass(at).shift, what="horizontal shift")
        d_north, d_east = fit.beta[0], fit.beta[1]
        at = replace(at, east_m=at.east_m + d_east, north_m=at.north_m + d_north)
        history.append({"east_m": at.east_m, "north_m": at.north_m})
        if np.hypot(d_east, d_north) / pixel_m < settings.tolerance_px:
            return at, fit, history, True
    assert fit is not None  # max_iterations >= 1 (spec)
    return at, fit, history, False


def with_optional_fits(
    at: Correction, eq: TileEquations, settings: PooledSettings, report: dict[str, Any]
) -> Correction:
    """The correction with the tilt and elevation-dependent bias the settings ask for; their
    fits (or why none) go into report under ``tilt`` and ``elevation_bias``."""
    if settings.fit_tilt:
        try:
            plane = solve(eq.plane, what="tilt")
            at = replace(at, tilt_east=plane.beta[1], tilt_north=plane.beta[2])
            report["tilt"] = {
                "east_m_per_km": plane.beta[1] * 1000,
                "north_m_per_km": plane.beta[2] * 1000,
                "origin": [at.origin_east, at.origin_north],
                "east_se_m_per_km": plane.standard_error(1) * 1000,
                "north_se_m_per_km": plane.standard_error(2) * 1000,
            }
        except CannotEstimateError as exc:
            report["tilt"] = {"status": "cannot_estimate", "reason": str(exc)}
    if settings.fit_elevation_bias:
        try:
            fit = solve(eq.elevation, what="elevation-dependent bias")
            at = replace(at, elevation_slope=fit.beta[1])
            report["elevation_bias"] = {
                "m_per_100m": fit.beta[1] * 100,
                "se_m_per_100m": fit.standard_error(1) * 100,
            }
        except CannotEstimateError as exc:
            report["elevation_bias"] = {"status": "cannot_estimate", "reason": str(exc)}
    return at


def region_shifts(eq: TileEquations, at: Correction, pixel_m: float) -> dict[str, Any]:
    """Each region's shift: the job shift plus the region's own one-step update, refused when
    the update is large or poorly determined (one step cannot be trusted there)."""
    out: dict[str, Any] = {}
    for region_id, fit in eq.regions.items():
        try:
            f = solve(fit, what=f"region {region_id}")
        except CannotEstimateError as exc:
            out[region_id] = {"status": "cannot_estimate", "reason": str(exc)}
            continue
        step_px = float(np.hypot(f.beta[0], f.beta[1])) / pixel_m
        se_px = max(f.standard_error(0), f.standard_error(1)) / pixel_m
        if step_px > MAX_REGION_UPDATE_PX or se_px > MAX_STANDARD_ERROR_PX:
            out[region_id] = {
                "status": "cannot_estimate",
                "reason": f"region {region_id}: one-step update {step_px:.1f} px (standard "
                f"error {se_px:.2f} px) is not trustworthy; try job_estimate: tile_median",
            }
            continue
        out[region_id] = {
            "status": "ok",
            "east_m": at.east_m + f.beta[1],
            "north_m": at.north_m + f.beta[0],
            "stable_pixels": f.n,
        }
    return out
