"""The ground of the demo world: bare-earth terrain (the provinces' reliefs blended by weight,
the Tarn Coast sea and island), land cover, and the canopy and roofs standing on it.

Coordinates are EPSG:32632 metres and heights EGM96 orthometric metres (see workers/demo/world.py).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from demaudit.workers.demo.options import CANOPY_RANGE_M, ROOF_RANGE_M, LandCover
from demaudit.workers.demo.waves import Waves
from demaudit.workers.demo.world import (
    COAST_LEVEL,
    ISLAND,
    TOWN,
    DemoWorld,
    Place,
    ProvinceLayout,
    only_where,
    place,
    province_layout,
)

_ISLAND_PEAK_M, _ISLAND_DROP_M = 8.0, 3.0
_BUILDING_PERIOD_M, _BUILDING_INSET_M = 30.0, 6.0


def disc_distance(world: DemoWorld, at: Place, disc: tuple[float, float, float]) -> np.ndarray:
    """Distance from a layout disc's centre in units of its radius (< 1 inside)."""
    u0, v0, radius = disc
    grid = world.grid
    dx = at.x - u0 * grid.width_m
    dy = -at.y - v0 * grid.height_m
    return np.hypot(dx, dy) / (radius * min(grid.width_m, grid.height_m))


def _island_height(world: DemoWorld, at: Place) -> np.ndarray:
    """Height of the Tarn Coast island bump above sea level (negative off the island)."""
    sigma = ISLAND[2] / math.sqrt(2 * math.log(_ISLAND_PEAK_M / _ISLAND_DROP_M))
    r = disc_distance(world, at, (ISLAND[0], ISLAND[1], sigma))
    return _ISLAND_PEAK_M * np.exp(-0.5 * r**2) - _ISLAND_DROP_M


def _inland(world: DemoWorld, at: Place) -> np.ndarray:
    """How far inland of the coastline a point lies, in unit coordinates (negative at sea)."""
    wander = world.coast_wander
    if at.is_grid:  # the wander of u - v, as plane waves in (u, v)
        along = Waves(wander.kx, -wander.kx, wander.phase, wander.amplitude)(at.u, at.v)
    else:
        along = wander(at.u - at.v)
    return COAST_LEVEL + along - (at.u + at.v - 1.0)


def _maybe_sea(world: DemoWorld, at: Place) -> np.ndarray:
    """False where the coastline cannot reach (the wander is bounded by its amplitudes)."""
    reach = float(np.abs(world.coast_wander.amplitude).sum()) + 1e-9
    return np.broadcast_to(at.u + at.v - 1.0 > COAST_LEVEL - reach, at.shape)


def _coast_heights(world: DemoWorld, at: Place) -> np.ndarray:
    """Tarn Coast relief: land sloping to a sea at height 0, with one island."""
    inland = _inland(world, at)
    land = 15.0 * inland / 0.6 + world.shore(at.x, at.y) * np.clip(inland / 0.2, 0.0, 1.0)
    if at.is_grid and _island_below_sea(world, at):
        return np.maximum(land, 0.0)  # the same: max(land, island, 0) with island < 0
    return np.maximum(np.maximum(land, _island_height(world, at)), 0.0)


def _island_below_sea(world: DemoWorld, at: Place) -> bool:
    """True if the island bump is under the sea at every point of a grid (its nearest point)."""
    grid = world.grid
    dx = at.x - ISLAND[0] * grid.width_m
    dy = -at.y - ISLAND[1] * grid.height_m
    nearest = Place(
        x=np.array([dx.flat[np.argmin(np.abs(dx))] + ISLAND[0] * grid.width_m]),
        y=np.array([-(dy.flat[np.argmin(np.abs(dy))] + ISLAND[1] * grid.height_m)]),
        u=np.zeros(1),
        v=np.zeros(1),
    )
    return bool(_island_height(world, nearest)[0] < 0)


def _reliefs(world: DemoWorld) -> dict[str, Callable[[Place], np.ndarray]]:
    return {
        "SU": lambda at: 160.0 + world.hills(at.x, at.y),
        "EW": lambda at: 65.0 + world.farmland(at.x, at.y),
        "HF": lambda at: 3.5 + world.fen(at.x, at.y),
        "TC": lambda at: _coast_heights(world, at),
    }


def terrain_at(world: DemoWorld, at: Place, layout: ProvinceLayout) -> np.ndarray:
    """Sum of the provinces' reliefs by weight; a relief is evaluated only where it weighs."""
    total = np.zeros(at.shape)  # + a term: the term exactly (0.0 + x == x)
    first = True
    for code, relief in _reliefs(world).items():
        weight = layout.weights[code]
        if not weight.any():
            continue
        weighs = weight != 0
        if at.dense or weighs.all():
            term = weight * relief(at)
        else:
            term = np.zeros(at.shape)
            term[weighs] = weight[weighs] * relief(at.subset(weighs))
        total = term if first else total + term
        first = False
    if total.shape == at.shape and total.flags.writeable:
        return total
    return np.array(np.broadcast_to(total, at.shape))  # a writable array of its own


def true_terrain(world: DemoWorld, easting: np.ndarray, northing: np.ndarray) -> np.ndarray:
    """Bare-earth terrain height (EGM96 orthometric, metres) at EPSG:32632 points.

    Defined everywhere (also outside the test domain); never NaN. Sea and water surfaces are part
    of it (the sea is at 0 m). Easting of shape (1, n) and northing of shape (m, 1) give the
    (m, n) grid.
    """
    at = place(world, easting, northing)
    return terrain_at(world, at, province_layout(world, at))


def terrain_slope(
    world: DemoWorld, easting: np.ndarray, northing: np.ndarray, *, step_m: float = 0.5
) -> np.ndarray:
    """tan(slope) of the true terrain (dimensionless), by central differences of step_m metres."""
    e = np.asarray(easting, dtype=float)
    n = np.asarray(northing, dtype=float)
    d_east = true_terrain(world, e + step_m, n) - true_terrain(world, e - step_m, n)
    d_north = true_terrain(world, e, n + step_m) - true_terrain(world, e, n - step_m)
    return np.hypot(d_east, d_north) / (2 * step_m)


def land_cover(world: DemoWorld, easting: np.ndarray, northing: np.ndarray) -> np.ndarray:
    """Land-cover class (uint8, see LandCover) of the world at EPSG:32632 points; never 0."""
    at = place(world, easting, northing)
    return land_cover_at(world, at, province_layout(world, at))


def land_cover_at(world: DemoWorld, at: Place, layout: ProvinceLayout) -> np.ndarray:
    west, north = layout.west, layout.north
    forest = only_where(north, lambda p: world.forest_field(p.x, p.y), at)
    classes = np.full(at.shape, LandCover.OPEN_GROUND, dtype=np.uint8)
    classes[(west & north & (forest > -0.7)) | (~west & north & (forest > 1.1))] = LandCover.FOREST
    south_east = ~west & ~north
    town = south_east & (only_where(south_east, lambda p: disc_distance(world, p, TOWN), at) < 1.0)
    classes[town] = LandCover.BUILT_UP
    classes[water_at(world, at, layout)] = LandCover.WATER
    return classes


def water_at(world: DemoWorld, at: Place, layout: ProvinceLayout) -> np.ndarray:
    """True on the sea (off the island) and on the lakes of Harrow Fen."""
    inland = only_where(_maybe_sea(world, at), lambda p: _inland(world, p), at)
    offshore = inland < 0
    island = only_where(offshore, lambda p: _island_height(world, p), at)
    sea = offshore & (island <= 0)
    fen = layout.west & ~layout.north & (layout.weights["HF"] > 0.8)
    lakes = fen & (only_where(fen, lambda p: world.lake_field(p.x, p.y), at) > 1.0)
    return np.asarray(sea | lakes)


def _hash_unit(i: np.ndarray, j: np.ndarray, salt: int) -> np.ndarray:
    """Deterministic pseudo-random numbers in [0, 1) for integer pairs (splitmix64 mixing).

    i and j broadcast against each other.
    """
    with np.errstate(over="ignore"):
        z = np.asarray(i).astype(np.int64).astype(np.uint64) * np.uint64(0x9E3779B97F4A7C15)
        z = z ^ np.asarray(j).astype(np.int64).astype(np.uint64) * np.uint64(0xC2B2AE3D27D4EB4F)
        z ^= np.uint64(salt)
        z ^= z >> np.uint64(30)
        z *= np.uint64(0xBF58476D1CE4E5B9)
        z ^= z >> np.uint64(27)
        z *= np.uint64(0x94D049BB133111EB)
        z ^= z >> np.uint64(31)
    return (z >> np.uint64(11)).astype(np.float64) * 2.0**-53


def cover_heights(
    world: DemoWorld, easting: np.ndarray, northing: np.ndarray, classes: np.ndarray
) -> np.ndarray:
    """Height of canopy and roofs above the terrain (metres) at EPSG:32632 points.

    Forest carries a canopy of 6..20 m that varies smoothly from stand to stand; built-up land
    carries buildings of 18 x 18 m on a 30 m block grid (about 60 % of the blocks) with flat roofs
    of 6..15 m. Zero elsewhere. ``classes`` is the land cover at the same points.
    """
    return cover_heights_at(world, place(world, easting, northing), classes)


def cover_heights_at(world: DemoWorld, at: Place, classes: np.ndarray) -> np.ndarray:
    low, high = CANOPY_RANGE_M
    forest = classes == LandCover.FOREST
    built_up = classes == LandCover.BUILT_UP

    def canopy(p: Place) -> np.ndarray:
        return (low + high) / 2 + (high - low) / 2 * np.tanh(world.canopy_field(p.x, p.y))

    def roofs(p: Place) -> np.ndarray:
        block_i = np.floor(p.x / _BUILDING_PERIOD_M)
        block_j = np.floor(-p.y / _BUILDING_PERIOD_M)
        inset_x = p.x - block_i * _BUILDING_PERIOD_M
        inset_y = -p.y - block_j * _BUILDING_PERIOD_M
        inner = _BUILDING_PERIOD_M - _BUILDING_INSET_M
        footprint = (
            (inset_x >= _BUILDING_INSET_M)
            & (inset_x < inner)
            & (inset_y >= _BUILDING_INSET_M)
            & (inset_y < inner)
        )
        built = _hash_unit(block_i, block_j, world.roof_salt) < 0.6
        roof_low, roof_high = ROOF_RANGE_M
        roof = roof_low + (roof_high - roof_low) * _hash_unit(block_j, block_i, world.roof_salt + 1)
        return np.where(footprint & built, roof, np.nan)

    heights = np.zeros(at.shape)
    if forest.any():
        heights = np.where(forest, only_where(forest, canopy, at), heights)
    if built_up.any():
        roof = only_where(built_up, roofs, at)
        heights = np.where(built_up & ~np.isnan(roof), roof, heights)
    return heights
