"""One tile's contribution to the error model (pure; runs on the workers).

Stable terrain is the valid pixels of a non-vegetated land-cover class (every pixel when the job
has no land cover), with a finite slope, within the tile's own outlier limits (the spec's rule
and factor applied to the tile's stable pixels: median +- factor x NMAD, or +- factor x RMSE; a
tile-level limit, so one pass suffices). Their dh is summarised as mergeable DhSummary
(workers/stats/summary.py) per fine slope bin (2 degrees up to 70, then 70-90), per bin of
absolute curvature, and per (slope bin, curvature bin) cell, so NMAD per bin comes out of the
merge exactly as for regions. A seeded random sample of at most ``samples_per_tile`` stable
pixels keeps (x, y, dh, slope, curvature) and a random priority; every valid pixel is counted per
area x land-cover class x 1-degree slope bin x curvature bin (to weight sigma^2 over regions and
strata later); and the slope and |curvature| of the valid pixels are block-averaged like the dh
overview (for the standardised dh overview).

Curvature is that of the reference: |z_xx + z_yy| x 100 (1/m x 100), z_xx and z_yy being r and
t of Zevenbergen & Thorne (1987) on the 3 x 3 window (workers/tile/derivatives.py), i.e. the
magnitude of their total curvature -2 (D + E) x 100 (from memory); the tile's outer ring takes
its inner neighbour's value.
"""

from __future__ import annotations

import zlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.stats.summary import DhSummary
from demaudit.workers.tile.derivatives import windows
from demaudit.workers.tile.difference import block_mean
from demaudit.workers.tile.grid import Grid
from demaudit.workers.tile.keyed_summary import summarise_cells
from demaudit.workers.tile.strata import EXCLUDED_CODE, ClassInfo, class_codes
from demaudit.workers.tile.terrain import slope_degrees

SLOPE_EDGES_DEG = (*range(0, 72, 2), 90)  # 2-degree bins up to 70, then 70-90
N_SLOPE = len(SLOPE_EDGES_DEG) - 1
CURVATURE_EDGES = (0.0, 0.1, 0.25, 0.5, 1.0, 2.0, 5.0)  # |curvature| x 100 (1/m); last open
N_CURVATURE = len(CURVATURE_EDGES)  # curvature bins (the last open above)
CURVATURE_KEYS = N_CURVATURE + 1  # and one for no curvature (NaN reference) in the counts
DEGREE_BINS = 91  # 1-degree slope bins 0..89, and 90 for no slope (edge or NaN)
NON_VEGETATED = "non_vegetated"


@dataclass(frozen=True)
class ErrorModelOptions:
    """What a worker needs to sample the error model (from the spec's ``error_model``,
    ``outliers`` and ``options`` sections)."""

    seed: int = 0
    samples_per_tile: int = 2000
    outlier_rule: str = "nmad"
    outlier_factor: float = 5.0
    overview_factor: int = 8


@dataclass(frozen=True, eq=False)
class TileErrorSample:
    """One tile's contribution (see module). Coordinates are in ``crs`` (WKT). ``joint_bins``
    is keyed slope bin x N_CURVATURE + curvature bin; ``joint_sums`` holds per such cell the sums
    of slope (degrees) and |curvature| of its pixels (shape (2, N_SLOPE x N_CURVATURE))."""

    crs: str
    pixel_area_m2: float
    slope_bins: dict[int, DhSummary]
    curvature_bins: dict[int, DhSummary]
    joint_bins: dict[int, DhSummary]
    joint_sums: NDArray[np.float64]
    x: NDArray[np.float64]
    y: NDArray[np.float64]
    dh: NDArray[np.float64]
    slope_deg: NDArray[np.float64]
    curvature: NDArray[np.float64]
    priority: NDArray[np.float64]
    counts: dict[str, NDArray[np.int64]]  # area -> (class code, degree, curvature key) counts
    stable: int = 0
    outside_limits: int = 0
    terrain_overview: NDArray[np.float32] | None = None  # (2, rows, cols): slope, |curvature|


def abs_curvature(heights: NDArray[np.floating], *, px: float, py: float) -> NDArray[np.float64]:
    """|z_xx + z_yy| x 100 (see module: r + t of Zevenbergen & Thorne on the 3 x 3 windows of
    workers/tile/derivatives.py), the outer ring copied from its inner neighbours; NaN where the
    window's cross holds a NaN."""
    z = np.asarray(heights, dtype=np.float64)
    out = np.full(z.shape, np.nan)
    if min(z.shape) < 3:
        return out
    _, z2, _, z4, z5, z6, _, z8, _ = windows(z)
    twice = 2.0 * z5
    out[1:-1, 1:-1] = np.abs((z4 - twice + z6) / (px * px) + (z2 - twice + z8) / (py * py)) * 100
    out[0, :], out[-1, :] = out[1, :], out[-2, :]
    out[:, 0], out[:, -1] = out[:, 1], out[:, -2]
    return out


def _bin_of(values: NDArray[np.float64], edges: tuple[float, ...]) -> NDArray[np.intp]:
    """The bin of each value among few sorted edges (0 below edges[1], len(edges) - 1 at or
    above the last): a count of the edges reached, cheaper than a binary search per value."""
    keys = np.zeros(values.shape, dtype=np.intp)
    for edge in edges[1:]:
        keys += values >= edge
    return keys


def slope_key(slope_deg: NDArray[np.float64]) -> NDArray[np.intp]:
    """The 2-degree slope bin (SLOPE_EDGES_DEG) of each slope."""
    keys = np.searchsorted(SLOPE_EDGES_DEG, slope_deg, side="right") - 1
    return np.clip(keys, 0, N_SLOPE - 1).astype(np.intp)


def curvature_key(curvature: NDArray[np.float64]) -> NDArray[np.intp]:
    """The curvature bin (CURVATURE_EDGES) of each |curvature|; N_CURVATURE where NaN."""
    return np.where(np.isnan(curvature), N_CURVATURE, _bin_of(curvature, CURVATURE_EDGES))


def tile_error_sample(
    dh: NDArray[np.floating],
    *,
    reference: NDArray[np.floating],
    landcover: NDArray[np.floating] | None,
    classes: Sequence[ClassInfo],
    region_masks: Mapping[str, NDArray[np.bool_]],
    pixel_centres: Any,
    crs: str,
    pixel_size_m: tuple[float, float],
    tile_id: str,
    options: ErrorModelOptions,
) -> TileErrorSample:
    """A tile's error-model contribution (see module). dh and reference in metres on the tile's
    grid (NaN = none); ``pixel_centres(rows, cols)`` gives map coordinates in ``crs``."""
    px, py = pixel_size_m
    ref = np.asarray(reference, np.float64)
    slope = slope_degrees(ref, pixel_size_x_m=px, pixel_size_y_m=py)
    curvature = abs_curvature(ref, px=px, py=py)
    codes = class_codes(landcover, classes, size=dh.size).reshape(dh.shape)
    valid = np.isfinite(dh) & (codes != EXCLUDED_CODE)
    n_codes = len([c for c in classes if c.group != "excluded"]) + 1
    counts = _area_counts(codes, slope, curvature, valid, region_masks, n_codes)
    stable = _stable(valid, slope, curvature, codes, landcover, classes)
    (flat,) = np.nonzero(stable.ravel())
    values = np.asarray(dh, np.float64).ravel()[flat]
    inside = _within_limits(values, rule=options.outlier_rule, factor=options.outlier_factor)
    flat, values = flat[inside], values[inside]
    s_flat, k_flat = slope.ravel()[flat], curvature.ravel()[flat]
    rng = np.random.default_rng([options.seed, zlib.crc32(tile_id.encode())])
    take = min(options.samples_per_tile, flat.size)
    pick = np.sort(rng.choice(flat.size, size=take, replace=False)) if take else np.zeros(0, int)
    rows, cols = np.divmod(flat[pick], dh.shape[1])
    x, y = pixel_centres(rows.astype(np.float64), cols.astype(np.float64))
    return TileErrorSample(
        crs=crs,
        pixel_area_m2=float(px * py),
        **_bins(values, s_flat, k_flat),
        x=np.asarray(x, np.float64),
        y=np.asarray(y, np.float64),
        dh=values[pick],
        slope_deg=s_flat[pick],
        curvature=k_flat[pick],
        priority=rng.random(take),
        counts=counts,
        stable=int(flat.size),
        outside_limits=int((~inside).sum()),
        terrain_overview=_terrain_overview(slope, curvature, valid, options.overview_factor),
    )


def _area_counts(
    codes: NDArray[np.uint8],
    slope: NDArray[np.float64],
    curvature: NDArray[np.float64],
    valid: NDArray[np.bool_],
    region_masks: Mapping[str, NDArray[np.bool_]],
    n_codes: int,
) -> dict[str, NDArray[np.int64]]:
    """Valid pixels per area ('*' = the tile) x class code x degree x curvature key."""
    degree = np.where(np.isfinite(slope), np.clip(np.floor(slope), 0, 89), 90).astype(np.intp)
    cell = (codes.astype(np.intp) * DEGREE_BINS + degree) * CURVATURE_KEYS + curvature_key(
        curvature
    )
    shape = (n_codes, DEGREE_BINS, CURVATURE_KEYS)
    size = int(np.prod(shape))
    return {
        area: np.bincount(cell[valid & mask], minlength=size).reshape(shape).astype(np.int64)
        for area, mask in {"*": np.ones(valid.shape, bool), **region_masks}.items()
    }


def _stable(
    valid: NDArray[np.bool_],
    slope: NDArray[np.float64],
    curvature: NDArray[np.float64],
    codes: NDArray[np.uint8],
    landcover: NDArray[np.floating] | None,
    classes: Sequence[ClassInfo],
) -> NDArray[np.bool_]:
    """Valid pixels of a non-vegetated class (all without land cover) with slope and curvature."""
    stable = valid & np.isfinite(slope) & np.isfinite(curvature)
    if landcover is None:
        return stable
    kept = [c for c in classes if c.group != "excluded"]
    is_open = np.zeros(256, dtype=bool)
    is_open[[k for k, c in enumerate(kept) if c.group == NON_VEGETATED]] = True
    return stable & is_open[codes]  # type: ignore[no-any-return]


def _within_limits(values: NDArray[np.float64], *, rule: str, factor: float) -> NDArray[np.bool_]:
    if values.size == 0:
        return np.zeros(0, bool)
    if rule == "rmse":
        half = factor * float(np.sqrt(np.mean(values * values)))
        return np.abs(values) <= half  # type: ignore[no-any-return]
    median = float(np.median(values))
    nmad = dh_summary.NMAD_FACTOR * float(np.median(np.abs(values - median)))
    return np.abs(values - median) <= factor * nmad  # type: ignore[no-any-return]


def _bins(
    values: NDArray[np.float64], slope: NDArray[np.float64], curvature: NDArray[np.float64]
) -> dict[str, Any]:
    """The slope, curvature and joint bins of the stable values, and the joint cells' sums."""
    s_key, k_key = slope_key(slope), curvature_key(curvature)
    joint = np.where(k_key < N_CURVATURE, s_key * N_CURVATURE + k_key, -1)
    n_joint = N_SLOPE * N_CURVATURE
    on = joint >= 0
    sums = np.stack(
        [
            np.bincount(joint[on], weights=slope[on], minlength=n_joint),
            np.bincount(joint[on], weights=curvature[on], minlength=n_joint),
        ]
    )
    return {
        "slope_bins": _binned(values, s_key, N_SLOPE),
        "curvature_bins": _binned(values, np.where(k_key < N_CURVATURE, k_key, -1), N_CURVATURE),
        "joint_bins": _binned(values, joint, n_joint),
        "joint_sums": sums,
    }


def _binned(values: NDArray[np.float64], keys: NDArray[np.integer], n: int) -> dict[int, DhSummary]:
    cells = summarise_cells(values, np.asarray(keys, dtype=np.intp), n)
    return {k: cells.union([k]) for k in range(n) if cells.count[k]}


def _terrain_overview(
    slope: NDArray[np.float64],
    curvature: NDArray[np.float64],
    valid: NDArray[np.bool_],
    factor: int,
) -> NDArray[np.float32]:
    """Block means (like the dh overview) of the valid pixels' slope and |curvature|."""
    return np.stack(
        [
            block_mean(np.where(valid, slope, np.nan), factor),
            block_mean(np.where(valid, curvature, np.nan), factor),
        ]
    )


def grid_error_sample(
    grid: Grid,
    tile_id: str,
    dh: NDArray[np.floating],
    reference: NDArray[np.floating],
    landcover: NDArray[np.floating] | None,
    region_masks: Mapping[str, NDArray[np.bool_]],
    classes: Sequence[ClassInfo],
    options: ErrorModelOptions | None,
) -> TileErrorSample | None:
    """tile_error_sample on a tile's grid (None when the job has no error model)."""
    if options is None:
        return None
    return tile_error_sample(
        dh,
        reference=reference,
        landcover=landcover,
        classes=classes,
        region_masks=region_masks,
        pixel_centres=grid.pixel_centres,
        crs=grid.crs,
        pixel_size_m=grid.pixel_size_m(),
        tile_id=tile_id,
        options=options,
    )
