"""The job-wide co-registration estimate from the tiles' own estimates (pure).

``tile_median``: the job's values are the medians over the tiles that could estimate, their
standard errors from the tiles' spread (sqrt(pi / 2) x NMAD / sqrt(n), the median's standard
error for normal data), and tiles far from the job's values are listed as outliers (a bad
delivery block stands out). The pooled estimate is in coregistration/pooled.py; the Dask
fan-out that gathers the tiles' estimates is service/run/coregistration.py.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Any

import numpy as np
from numpy.typing import NDArray
from shapely.geometry import Point

from demaudit.workers.coregistration.shift import MEDIAN_KEYS, ShiftEstimate
from demaudit.workers.coregistration.tile import Correction
from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.inputs.regions import Region


@dataclass(frozen=True)
class JobEstimate:
    """The job's correction (None when it cannot be estimated) and the report of the estimate
    (summary.json's ``coregistration`` section, before the statistics after it are added)."""

    correction: Correction | None
    report: dict[str, Any]


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


def origin_of(tiles: Sequence[TileInfo]) -> Correction:
    """A zero correction whose tilt origin is the mean of the tiles' centres (test CRS)."""
    bounds = [t.bounds for t in tiles]
    return Correction(
        origin_east=float(np.mean([(b[0] + b[2]) / 2 for b in bounds])),
        origin_north=float(np.mean([(b[1] + b[3]) / 2 for b in bounds])),
    )


def nmad(values: NDArray[np.float64]) -> float:
    """1.4826 x the median absolute deviation from the median (sigma for normal data)."""
    return float(1.4826 * np.median(np.abs(values - np.median(values))))


def median_standard_error(values: NDArray[np.float64]) -> float:
    """Standard error of the median of values: MEDIAN_SE_FACTOR x NMAD / sqrt(n) (asymptotic,
    for roughly normal values; NaN when empty)."""
    if values.size == 0:
        return float("nan")
    return MEDIAN_SE_FACTOR * nmad(values) / float(np.sqrt(values.size))


def _se_key(key: str) -> str:
    return key.replace("_m", "_se_m", 1) if key.endswith("_m") else key + "_se"


def tile_median(
    estimates: Mapping[str, ShiftEstimate], origin: Correction, *, fit_tilt: bool
) -> JobEstimate:
    """The job's correction as the medians of the tiles' estimates (tile id -> estimate), with
    standard errors, the tiles' spread and the outlier tiles; None when fewer than MIN_TILES
    tiles could estimate."""
    ok = {k: e for k, e in estimates.items() if e.ok}
    report: dict[str, Any] = {
        "method": "median of the tiles' own Nuth & Kääb (2011) estimates",
        "tiles_estimated": len(ok),
        "tiles_not_estimated": {k: e.reason for k, e in estimates.items() if k not in ok},
    }
    if len(ok) < MIN_TILES:
        return JobEstimate(None, report | {
            "status": "cannot_estimate",
            "reason": f"only {len(ok)} tile(s) could estimate a shift (at least {MIN_TILES} "
            "needed); try job_estimate: pooled",
        })  # fmt: skip
    values = {key: np.array([e.values[key] for e in ok.values()]) for key in MEDIAN_KEYS}
    centre = {key: float(np.median(v)) for key, v in values.items()}
    spread = {key: nmad(v) for key, v in values.items()}
    report |= {
        "status": "ok",
        **centre,
        **{_se_key(key): median_standard_error(v) for key, v in values.items()},
        "standard_error_note": "of the median over the tiles: sqrt(pi/2) x tile NMAD / "
        "sqrt(tiles), assuming roughly normal tile estimates",
        "tile_spread_nmad": spread,
        "outlier_tiles": outlier_tiles(ok, centre, spread),
    }
    return JobEstimate(_median_correction(origin, centre, fit_tilt=fit_tilt), report)


def outlier_tiles(
    estimates: Mapping[str, ShiftEstimate],
    centre: Mapping[str, float],
    spread: Mapping[str, float],
) -> dict[str, dict[str, float]]:
    """Tiles whose values lie more than OUTLIER_NMADS tile NMADs (and the floor) from the job's
    values: tile id -> the values that do."""
    outliers = {}
    for tile_id, e in estimates.items():
        off = [
            key
            for key in MEDIAN_KEYS
            if abs(e.values[key] - centre[key])
            > max(OUTLIER_NMADS * spread[key], OUTLIER_FLOORS[key])
        ]
        if off:
            outliers[tile_id] = {key: e.values[key] for key in off}
    return outliers


def _median_correction(
    origin: Correction, centre: Mapping[str, float], *, fit_tilt: bool
) -> Correction:
    correction = replace(
        origin, east_m=centre["east_m"], north_m=centre["north_m"], vertical_m=centre["vertical_m"]
    )
    if fit_tilt:
        correction = replace(
            correction,
            tilt_east=centre["tilt_east_m_per_km"] / 1000,
            tilt_north=centre["tilt_north_m_per_km"] / 1000,
        )
    return correction


def region_medians(
    estimates: Mapping[str, ShiftEstimate],
    tiles: Sequence[TileInfo],
    regions: Mapping[str, list[Region]],
) -> dict[str, Any]:
    """Each region's median of the estimates of the tiles whose centre lies in it (regions by
    test CRS, as the catalog holds them)."""
    members: dict[str, list[ShiftEstimate]] = {}
    for t in tiles:
        estimate = estimates.get(t.tile_id)
        if estimate is None or not estimate.ok:
            continue
        b = t.bounds
        centre = Point((b[0] + b[2]) / 2, (b[1] + b[3]) / 2)
        for region in regions.get(t.grid.crs, []):
            if region.geometry.contains(centre):
                members.setdefault(region.region_id, []).append(estimate)
    return {
        region_id: {"tiles": len(found)}
        | {key: float(np.median([e.values[key] for e in found])) for key in MEDIAN_KEYS}
        for region_id, found in members.items()
    }
