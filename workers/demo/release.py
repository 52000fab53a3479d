"""The two surveys of the demo world, with the errors injected into them: one test-release tile
(shift, bias, canopy and roofs, noise, blunders, voids, tilt) and the lidar reference heights.

Coordinates are EPSG:32632 metres and heights EGM96 orthometric metres (see workers/demo/world.py).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from demaudit.workers.demo.options import (
    BLUNDER_RANGE_M,
    LIDAR_NOISE_M,
    DemoArchiveOptions,
    RandomStream,
    tilted_tiles,
)
from demaudit.workers.demo.surface import (
    cover_heights_at,
    land_cover_at,
    terrain_at,
    terrain_slope,
    water_at,
)
from demaudit.workers.demo.world import DemoWorld, place, province_layout


def tilt_ramp(easting: np.ndarray, *, m_per_km: float, west: float) -> np.ndarray:
    """The planar tilt (metres): m_per_km per kilometre east of ``west`` (EPSG:32632 metres)."""
    return m_per_km / 1000.0 * (np.asarray(easting, dtype=float) - west)


@dataclass(frozen=True)
class VoidDisc:
    """A void (nodata from failed matching): centre and radius in pixels of its tile."""

    col: float
    row: float
    radius: float


def void_discs(options: DemoArchiveOptions, col: int, row: int) -> tuple[VoidDisc, ...]:
    """The voids of one test tile (Poisson count, void_patches per 10 tiles on average)."""
    if options.void_patches == 0:
        return ()
    rng = np.random.default_rng([options.seed, RandomStream.VOIDS, col, row])
    largest = max(4.0, options.pixels / 10)
    return tuple(
        VoidDisc(
            col=float(rng.uniform(0, options.pixels)),
            row=float(rng.uniform(0, options.pixels)),
            radius=float(rng.uniform(3.0, largest)),
        )
        for _ in range(rng.poisson(options.void_patches / 10))
    )


def void_mask(discs: tuple[VoidDisc, ...], pixels: int) -> np.ndarray:
    """Boolean (pixels, pixels) mask, True where a pixel centre lies in a void disc."""
    centre = np.arange(pixels) + 0.5
    mask = np.zeros((pixels, pixels), dtype=bool)
    for disc in discs:
        mask |= np.hypot(centre[None, :] - disc.col, centre[:, None] - disc.row) <= disc.radius
    return mask


def random_error(
    rng: np.random.Generator, tan_slope: np.ndarray, *, sigma_m: float, slope_factor: float
) -> np.ndarray:
    """Normal error (metres) with sigma = sigma_m + slope_factor * tan(slope); 0 if sigma_m is 0."""
    if sigma_m == 0:
        return np.zeros(np.shape(tan_slope))
    sigma = sigma_m + slope_factor * np.asarray(tan_slope)
    return sigma * rng.standard_normal(sigma.shape)


def blunder_error(
    rng: np.random.Generator, shape: tuple[int, ...], *, fraction: float
) -> np.ndarray:
    """Blunders (metres): a fraction of the pixels off by 5..50 m of either sign, 0 elsewhere."""
    if fraction == 0:
        return np.zeros(shape)
    hit = rng.random(shape) < fraction
    size = rng.uniform(*BLUNDER_RANGE_M, shape)
    sign = np.where(rng.random(shape) < 0.5, -1.0, 1.0)
    return np.where(hit, sign * size, 0.0)


@dataclass(frozen=True, eq=False)
class ReleaseTile:
    """One tile of the test release before the datum change (orthometric metres, NaN in voids).

    ``heights`` carry every injected error except the tilt; ``ramp`` is the tilt of the tile
    (zeros outside the tilted block), so the delivered tile is heights + ramp and the corrected
    update tile is heights. ``land_cover`` describes what the tile shows (it moves with the shift).
    """

    col: int
    row: int
    heights: np.ndarray
    ramp: np.ndarray
    land_cover: np.ndarray
    blunders: int
    voids: tuple[VoidDisc, ...]


def release_tile(world: DemoWorld, col: int, row: int) -> ReleaseTile:
    """Simulate one test tile: shifted surface, bias, canopy and roofs, noise, blunders, voids.

    The smooth fields are evaluated on the tile's grid axes (see Waves._on_grid); the random
    errors come from the (seed, stream, col, row) streams, drawn for the whole tile.
    """
    options = world.options
    easting, northing = world.grid.pixel_axes(col, row)
    shape = (options.pixels, options.pixels)
    seen_e = easting - options.shift_east_m
    seen_n = northing - options.shift_north_m
    at = place(world, seen_e, seen_n)
    layout = province_layout(world, at)
    classes = land_cover_at(world, at, layout)
    heights = terrain_at(world, at, layout) + options.vertical_bias_m
    if options.canopy:
        heights += cover_heights_at(world, at, classes)
    slope = np.zeros(shape)
    if options.noise_sigma_m:
        slope = terrain_slope(world, seen_e, seen_n)
    heights += random_error(
        np.random.default_rng([options.seed, RandomStream.NOISE, col, row]),
        slope,
        sigma_m=options.noise_sigma_m,
        slope_factor=options.noise_slope_factor,
    )
    blunders = blunder_error(
        np.random.default_rng([options.seed, RandomStream.BLUNDERS, col, row]),
        shape,
        fraction=options.blunder_fraction,
    )
    voids = void_discs(options, col, row)
    heights = np.where(void_mask(voids, options.pixels), np.nan, heights + blunders)
    ramp = np.zeros(shape)
    if (col, row) in tilted_tiles(options):
        ramp[:] = tilt_ramp(easting, m_per_km=options.tilt_m_per_km, west=world.grid.west)
    return ReleaseTile(
        col=col,
        row=row,
        heights=heights,
        ramp=ramp,
        land_cover=classes,
        blunders=int(np.count_nonzero(blunders[~np.isnan(heights)])),
        voids=voids,
    )


def reference_heights(
    world: DemoWorld,
    easting: np.ndarray,
    northing: np.ndarray,
    *,
    tile_key: tuple[int, int],
    margin_m: float,
) -> np.ndarray:
    """Lidar terrain (EGM96 orthometric metres) at EPSG:32632 points, NaN where missing.

    True terrain plus lidar noise (sigma 0.03 m, none for clean options) drawn from a stream of
    (seed, tile_key) for every point; NaN on water (no returns) and farther than margin_m outside
    the test domain. On a 2-D raster of positions the terrain is evaluated at every pixel (by
    the fast path of Waves) and the masks select; at other points only where it is kept.
    """
    options = world.options
    grid = world.grid
    easting = np.asarray(easting, dtype=float)
    northing = np.asarray(northing, dtype=float)
    covered = (
        (easting >= grid.west - margin_m)
        & (easting <= grid.west + grid.width_m + margin_m)
        & (northing <= grid.north + margin_m)
        & (northing >= grid.north - grid.height_m - margin_m)
    )
    if not covered.any():
        return np.full(easting.shape, np.nan)
    noise = np.zeros(easting.shape)  # the tile's own stream: skipping it above changes nothing
    if not options.clean:
        rng = np.random.default_rng([options.seed, RandomStream.REFERENCE, *tile_key])
        noise = LIDAR_NOISE_M * rng.standard_normal(easting.shape)
    if easting.ndim == 2:  # a raster's positions: every pixel, so Waves may use their lattice
        at = place(world, easting, northing)
        layout = province_layout(world, at)
        kept = np.where(
            covered & ~water_at(world, at, layout), terrain_at(world, at, layout), np.nan
        )
        return kept + noise
    heights = np.full(easting.shape, np.nan)
    at = place(world, easting[covered], northing[covered])
    layout = province_layout(world, at)
    land = ~water_at(world, at, layout)
    if land.all():
        kept = terrain_at(world, at, layout)
    else:
        on_land = at.subset(land)
        kept = np.full(at.shape, np.nan)
        kept[land] = terrain_at(world, on_land, province_layout(world, on_land))
    heights[covered] = kept + noise[covered]
    return heights
