"""The job-wide co-registration estimate, formed on the cluster without moving pixels.

Two ways, as the spec says:

* ``tile_median`` (default): one pass in which every tile (or every n-th) finds its own
  Nuth & Kääb shift, bias and tilt; the job's values are the medians over the tiles that could
  estimate, their standard errors from the tiles' spread (sqrt(pi / 2) x NMAD / sqrt(n), the
  median's standard error for normal data), and tiles far from the job's values are listed as
  outliers (a bad delivery block stands out).
* ``pooled``: repeated passes, each returning mergeable normal equations of all stable pixels,
  until the shift update is below the tolerance.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import replace
from typing import Any

import numpy as np
from distributed import Client, as_completed
from numpy.typing import NDArray
from shapely.geometry import Point

from demaudit.workers.coregistration.estimate import (
    MAX_STANDARD_ERROR_PX,
    CannotEstimateError,
    FitResult,
    solve,
)
from demaudit.workers.coregistration.tile import Correction, TileEquations
from demaudit.workers.inputs import regions as region_ops
from demaudit.workers.inputs.catalog import Footprint, TileInfo
from demaudit.workers.inputs.regions import Region
from demaudit.workers.stats.summary import quantile
from demaudit.workers.tile.task import TileOptions, estimate_tile, estimate_tile_shift


def estimate_job_correction(
    client: Client,
    tiles: Sequence[TileInfo],
    *,
    references: Mapping[str, list[TileInfo]],
    landcover: Callable[[TileInfo], list[TileInfo]],
    regions: Mapping[str, list[Region]],
    options: TileOptions,
    known: Mapping[str, dict[str, Any]] | None = None,
    covered: Callable[[TileInfo], Sequence[Footprint]] = lambda _tile: (),
) -> tuple[Correction | None, dict[str, Any], dict[str, dict[str, Any]]]:
    """The job's correction (None when it cannot be estimated), a report of the estimate and
    the tiles' own shift records (tile id -> record).

    known: tile id -> shift record from an earlier run of tiles whose inputs did not change
    (a re-check); those tiles are not estimated again. The pooled estimate ignores it (its
    passes depend on the whole job's shift) and visits every sampled tile.
    covered: a tile's footprints of earlier-listed test tiles (catalog.tile_overlaps); those
    pixels are counted once, in the earlier tile, here as in the statistics.
    """
    coreg = options.coregistration
    assert coreg is not None
    sample = list(tiles[:: coreg.tile_stride])
    reuse = dict(known or {}) if coreg.job_estimate == "tile_median" else {}
    futures = {
        t.tile_id: client.submit(
            estimate_tile_shift,
            t,
            references[t.tile_id],
            options,
            landcover(t),
            covered(t),
            pure=False,
        )
        for t in sample
        if t.tile_id not in reuse
    }
    records = {
        t.tile_id: reuse[t.tile_id] if t.tile_id in reuse else futures[t.tile_id].result()
        for t in sample
    }
    origin = _origin(sample)
    if coreg.job_estimate == "tile_median":
        correction, report = _tile_median(records, origin, fit_tilt=coreg.fit_tilt)
        report["regions"] = _region_medians(records, sample, regions)
    else:
        correction, report = _pooled(
            client, sample, references, landcover, regions, options, origin, covered
        )
    report["tiles_used"] = len(sample)
    report["tiles_estimated_earlier"] = sum(t.tile_id in reuse for t in sample)
    return correction, report, records


def _origin(tiles: Sequence[TileInfo]) -> Correction:
    bounds = [t.bounds for t in tiles]
    return Correction(
        origin_east=float(np.mean([(b[0] + b[2]) / 2 for b in bounds])),
        origin_north=float(np.mean([(b[1] + b[3]) / 2 for b in bounds])),
    )


_TILE_KEYS = ("east_m", "north_m", "vertical_m", "tilt_east_m_per_km", "tilt_north_m_per_km")
#: A tile is an outlier when it differs from the job by more than this many tile NMADs ...
OUTLIER_NMADS = 3.0
#: ... and by more than these floors (metres; metres per km for tilts).
OUTLIER_FLOORS = {
    "east_m": 0.5,
    "north_m": 0.5,
    "vertical_m": 0.1,
    "tilt_east_m_per_km": 0.2,
    "tilt_north_m_per_km": 0.2,
}
MIN_TILES = 3
#: Standard error of the median of n normal values, in sigma / sqrt(n): sqrt(pi / 2) ~ 1.2533,
#: the median's asymptotic efficiency being 2 / pi relative to the mean (textbook result, common
#: practice); NMAD stands in for sigma.
MEDIAN_SE_FACTOR = float(np.sqrt(np.pi / 2.0))


def nmad(values: NDArray[np.float64]) -> float:
    """1.4826 x the median absolute deviation from the median (sigma for normal data)."""
    return float(1.4826 * np.median(np.abs(values - np.median(values))))


def median_standard_error(values: NDArray[np.float64]) -> float:
    """Standard error of the median of values: MEDIAN_SE_FACTOR x NMAD / sqrt(n) (asymptotic,
    for roughly normal values; NaN when empty)."""
    if values.size == 0:
        return float("nan")
    return MEDIAN_SE_FACTOR * nmad(values) / float(np.sqrt(values.size))


def _tile_median(
    records: Mapping[str, dict[str, Any]], origin: Correction, *, fit_tilt: bool
) -> tuple[Correction | None, dict[str, Any]]:
    ok = {k: r for k, r in records.items() if r.get("status") == "ok"}
    report: dict[str, Any] = {
        "method": "median of the tiles' own Nuth & Kääb (2011) estimates",
        "tiles_estimated": len(ok),
        "tiles_not_estimated": {k: r.get("reason") for k, r in records.items() if k not in ok},
    }
    if len(ok) < MIN_TILES:
        return None, report | {
            "status": "cannot_estimate",
            "reason": f"only {len(ok)} tile(s) could estimate a shift (at least {MIN_TILES} "
            "needed); try job_estimate: pooled",
        }
    values = {key: np.array([r[key] for r in ok.values()]) for key in _TILE_KEYS}
    centre = {key: float(np.median(v)) for key, v in values.items()}
    spread = {key: nmad(v) for key, v in values.items()}
    outliers = {}
    for tile_id, r in ok.items():
        off = [
            key
            for key in _TILE_KEYS
            if abs(r[key] - centre[key]) > max(OUTLIER_NMADS * spread[key], OUTLIER_FLOORS[key])
        ]
        if off:
            outliers[tile_id] = {key: r[key] for key in off}
    report |= {
        "status": "ok",
        **centre,
        **{
            key.replace("_m", "_se_m", 1) if key.endswith("_m") else key + "_se": (
                median_standard_error(v)
            )
            for key, v in values.items()
        },
        "standard_error_note": "of the median over the tiles: sqrt(pi/2) x tile NMAD / "
        "sqrt(tiles), assuming roughly normal tile estimates",
        "tile_spread_nmad": spread,
        "outlier_tiles": outliers,
    }
    correction = replace(
        origin, east_m=centre["east_m"], north_m=centre["north_m"], vertical_m=centre["vertical_m"]
    )
    if fit_tilt:
        correction = replace(
            correction,
            tilt_east=centre["tilt_east_m_per_km"] / 1000,
            tilt_north=centre["tilt_north_m_per_km"] / 1000,
        )
    return correction, report


def _region_medians(
    records: Mapping[str, dict[str, Any]],
    tiles: Sequence[TileInfo],
    regions: Mapping[str, list[Region]],
) -> dict[str, Any]:
    """Each region's median of the estimates of the tiles whose centre lies in it."""
    members: dict[str, list[dict[str, Any]]] = {}
    for t in tiles:
        record = records.get(t.tile_id, {})
        if record.get("status") != "ok":
            continue
        b = t.bounds
        centre = Point((b[0] + b[2]) / 2, (b[1] + b[3]) / 2)
        for region in regions.get(t.grid.crs, []):
            if region.geometry.contains(centre):
                members.setdefault(region.region_id, []).append(record)
    out: dict[str, Any] = {}
    for region_id, recs in members.items():
        out[region_id] = {"tiles": len(recs)} | {
            key: float(np.median([r[key] for r in recs])) for key in _TILE_KEYS
        }
    return out


def _pooled(
    client: Client,
    sample: Sequence[TileInfo],
    references: Mapping[str, list[TileInfo]],
    landcover: Callable[[TileInfo], list[TileInfo]],
    regions: Mapping[str, list[Region]],
    options: TileOptions,
    at: Correction,
    covered: Callable[[TileInfo], Sequence[Footprint]],
) -> tuple[Correction | None, dict[str, Any]]:
    coreg = options.coregistration
    assert coreg is not None
    px = min(t.grid.pixel_size_m()[0] for t in sample)
    history = []
    converged = False
    fit: FitResult | None = None
    try:
        for _ in range(coreg.max_iterations):
            equations = _pass(client, sample, references, landcover, regions, options, at, covered)
            fit = solve(equations.shift, what="horizontal shift")
            d_north, d_east = fit.beta[0], fit.beta[1]
            at = replace(at, east_m=at.east_m + d_east, north_m=at.north_m + d_north)
            history.append({"east_m": at.east_m, "north_m": at.north_m})
            if np.hypot(d_east, d_north) / px < coreg.tolerance_px:
                converged = True
                break
        equations = _pass(client, sample, references, landcover, regions, options, at, covered)
    except CannotEstimateError as exc:
        return None, {"status": "cannot_estimate", "reason": str(exc), "method": "pooled"}
    assert fit is not None
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
    at = _with_optional_fits(at, equations, coreg.fit_tilt, coreg.fit_elevation_bias, report)
    report["regions"] = _region_shifts(equations, at, px)
    return at, report


def _pass(
    client: Client,
    tiles: Sequence[TileInfo],
    references: Mapping[str, list[TileInfo]],
    landcover: Callable[[TileInfo], list[TileInfo]],
    regions: Mapping[str, list[Region]],
    options: TileOptions,
    at: Correction,
    covered: Callable[[TileInfo], Sequence[Footprint]],
) -> TileEquations:
    futures = [
        client.submit(
            estimate_tile,
            t,
            references[t.tile_id],
            region_ops.clip_to(regions.get(t.grid.crs, []), t.bounds),
            options,
            landcover(t),
            at,
            covered(t),
            pure=False,
        )
        for t in tiles
    ]
    total = TileEquations()
    for future in as_completed(futures):
        part = future.result()
        future.release()
        if part is not None:
            total = total.merge(part)
    return total


def _with_optional_fits(
    at: Correction, eq: TileEquations, tilt: bool, elevation: bool, report: dict[str, Any]
) -> Correction:
    if tilt:
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
    if elevation:
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


#: A region's one-step update larger than this (pixels) is not trusted.
MAX_REGION_UPDATE_PX = 2.0


def _region_shifts(eq: TileEquations, at: Correction, pixel_m: float) -> dict[str, Any]:
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
