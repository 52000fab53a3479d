"""The invented world of the demo archive: true terrain, land cover and the injected errors.

Pure functions of coordinates, seeds and small frozen dataclasses; no file I/O, no global state.
Unless a docstring says otherwise, coordinates are WGS 84 / UTM zone 32N (EPSG:32632) easting and
northing in metres and heights are EGM96 orthometric heights (EPSG:5773) in metres. Missing values
are NaN here; the archive writer turns them into the nodata value.

The provinces of the Valdmark scenario share the test domain like quadrants with wandering
borders: Skerra Uplands (SU) north-west, Eastwold (EW) north-east, Harrow Fen (HF) south-west and
Tarn Coast (TC) south-east. Their relief blends over ``blend_m`` metres (a quarter of it between
the two lowlands) on the west side of the west/east border and the north side of the north/south
border, so no cliff marks a border and Tarn Coast (with its coastline) stays pure. Positions in
the domain are also written as unit coordinates ``u`` (0 west .. 1 east) and ``v`` (0 north ..
1 south).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from enum import IntEnum
from functools import cached_property

import numpy as np
import shapely
from shapely.geometry import Point, Polygon
from shapely.geometry.base import BaseGeometry

NODATA = -9999.0
TEST_CRS = "EPSG:32632"
REFERENCE_CRS = "EPSG:3035"
DOMAIN_WEST_M = 480_000.0
DOMAIN_NORTH_M = 6_230_000.0
SURVEY_RMSE_M = 0.02
LIDAR_NOISE_M = 0.03
BLUNDER_RANGE_M = (5.0, 50.0)
CANOPY_RANGE_M = (6.0, 20.0)
ROOF_RANGE_M = (6.0, 15.0)
PROVINCES = {"SU": "Skerra Uplands", "EW": "Eastwold", "HF": "Harrow Fen", "TC": "Tarn Coast"}


# Layout in unit coordinates (u east, v south); radii in units of the shorter domain side.
_TOWN = (0.72, 0.70, 0.08)
_ENCLAVE = (0.22, 0.78, 0.05)
_ISLAND = (0.90, 0.90, 0.022)
_ISLAND_PEAK_M, _ISLAND_DROP_M = 8.0, 3.0
_COAST_LEVEL = 0.64
_BUILDING_PERIOD_M, _BUILDING_INSET_M = 30.0, 6.0


class RandomStream(IntEnum):
    """Independent random streams: numpy SeedSequence entropy is (seed, stream, ...)."""

    WORLD = 0
    NOISE = 1
    BLUNDERS = 2
    VOIDS = 3
    REFERENCE = 4
    CHECKPOINTS = 5


class LandCover(IntEnum):
    """Land-cover classes of the demo archive (0 is nodata)."""

    OPEN_GROUND = 1
    FOREST = 2
    BUILT_UP = 3
    WATER = 4


@dataclass(frozen=True)
class DemoArchiveOptions:
    """Size, seed and injected errors of a demo archive.

    Lengths and heights in metres. The shift moves the features of the test release by
    (+shift_east_m, +shift_north_m); the tilt is a planar ramp rising to the east on the 2 x 2
    delivery block at the north-west corner of Skerra Uplands.
    """

    tiles_x: int = 6
    tiles_y: int = 6
    pixels: int = 160
    pixel_size_m: float = 5.0
    seed: int = 1
    shift_east_m: float = 1.6
    shift_north_m: float = -0.9
    vertical_bias_m: float = 0.25
    canopy: bool = True
    noise_sigma_m: float = 0.30
    noise_slope_factor: float = 0.5
    blunder_fraction: float = 0.01
    void_patches: int = 3
    tilt_m_per_km: float = 1.0
    write_update: bool = True

    def __post_init__(self) -> None:
        if self.tiles_x < 1 or self.tiles_y < 1:
            raise ValueError("a demo archive needs at least one tile in each direction")
        if self.pixels < 8:
            raise ValueError("a demo tile needs at least 8 pixels a side")
        if not self.pixel_size_m > 0:
            raise ValueError("pixel_size_m must be positive")
        if self.seed < 0:
            raise ValueError("seed must be a non-negative integer")
        if self.noise_sigma_m < 0 or self.noise_slope_factor < 0:
            raise ValueError("noise_sigma_m and noise_slope_factor must not be negative")
        if not 0.0 <= self.blunder_fraction <= 1.0:
            raise ValueError("blunder_fraction must lie in [0, 1]")
        if self.void_patches < 0:
            raise ValueError("void_patches must not be negative")

    @property
    def clean(self) -> bool:
        """True when no random error is wanted (no noise, so no survey or lidar noise either)."""
        return self.noise_sigma_m == 0


@dataclass(frozen=True)
class TileGrid:
    """The regular tiling of the test release (EPSG:32632, metres, row 0 north)."""

    tiles_x: int
    tiles_y: int
    pixels: int
    pixel_size_m: float
    west: float = DOMAIN_WEST_M
    north: float = DOMAIN_NORTH_M

    @property
    def tile_size_m(self) -> float:
        return self.pixels * self.pixel_size_m

    @property
    def width_m(self) -> float:
        return self.tiles_x * self.tile_size_m

    @property
    def height_m(self) -> float:
        return self.tiles_y * self.tile_size_m

    def tile_id(self, col: int, row: int) -> str:
        return f"r26_E{col:02d}_N{row:02d}"

    def tiles(self) -> Iterator[tuple[int, int]]:
        """(col, row) of every tile, row by row from the north-west."""
        for row in range(self.tiles_y):
            for col in range(self.tiles_x):
                yield col, row

    def tile_origin(self, col: int, row: int) -> tuple[float, float]:
        """Easting and northing of the tile's north-west corner."""
        return self.west + col * self.tile_size_m, self.north - row * self.tile_size_m

    def pixel_centres(self, col: int, row: int) -> tuple[np.ndarray, np.ndarray]:
        """Easting and northing of every pixel centre of a tile, as (pixels, pixels) arrays."""
        west, north = self.tile_origin(col, row)
        offsets = (np.arange(self.pixels) + 0.5) * self.pixel_size_m
        easting, northing = np.meshgrid(west + offsets, north - offsets)
        return easting, northing

    def pixel_axes(self, col: int, row: int) -> tuple[np.ndarray, np.ndarray]:
        """The tile's pixel-centre eastings as a (1, pixels) row and northings as a (pixels, 1)
        column: they broadcast to the arrays of pixel_centres."""
        west, north = self.tile_origin(col, row)
        offsets = (np.arange(self.pixels) + 0.5) * self.pixel_size_m
        return (west + offsets)[None, :], (north - offsets)[:, None]

    def tile_of(self, easting: float, northing: float) -> tuple[int, int]:
        """(col, row) of the tile holding a point, clamped to the domain."""
        col = int((easting - self.west) // self.tile_size_m)
        row = int((self.north - northing) // self.tile_size_m)
        return min(max(col, 0), self.tiles_x - 1), min(max(row, 0), self.tiles_y - 1)


def tile_layout(options: DemoArchiveOptions) -> TileGrid:
    """The test tiling for these options."""
    return TileGrid(options.tiles_x, options.tiles_y, options.pixels, options.pixel_size_m)


def tilted_tiles(options: DemoArchiveOptions) -> tuple[tuple[int, int], ...]:
    """(col, row) of the tilted delivery block: cols 0-1, rows 0-1, clipped to the archive."""
    rows, cols = range(min(2, options.tiles_y)), range(min(2, options.tiles_x))
    return tuple((col, row) for row in rows for col in cols)


@dataclass(frozen=True, eq=False)
class _Waves:
    """A sum of plane waves, sum(a * cos(kx * x + ky * y + phase)); x, y in any one unit."""

    kx: np.ndarray
    ky: np.ndarray
    phase: np.ndarray
    amplitude: np.ndarray

    def __call__(self, x: np.ndarray, y: np.ndarray | float = 0.0) -> np.ndarray:
        if _is_grid(x, y):
            return self._on_grid(np.asarray(x), np.asarray(y))
        out = np.zeros(np.broadcast(x, y).shape)
        for kx, ky, phase, amplitude in zip(
            self.kx, self.ky, self.phase, self.amplitude, strict=True
        ):
            out += amplitude * np.cos(kx * x + ky * y + phase)
        return out

    def _on_grid(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        """The waves on a grid, x of shape (1, n) and y of shape (m, 1), as an (m, n) array.

        cos(a + b) = cos a cos b - sin a sin b: 4 (m + n) cosines and sines per wave and one
        matrix product instead of m n cosines. Equal to the pointwise sum within a few 1e-15 of
        the amplitudes (the rounding of the phase differs).
        """
        a = self.kx[:, None] * x[0][None, :]  # (waves, n)
        b = self.ky[:, None] * y[:, 0][None, :] + self.phase[:, None]  # (waves, m)
        amplitude = self.amplitude[:, None]
        rows = np.concatenate([amplitude * np.cos(b), -amplitude * np.sin(b)]).T  # (m, 2 waves)
        cols = np.concatenate([np.cos(a), np.sin(a)])  # (2 waves, n)
        return np.asarray(rows @ cols)


def _is_grid(x: np.ndarray | float, y: np.ndarray | float) -> bool:
    """True for the axes of a regular grid: x of shape (1, n) and y of shape (m, 1)."""
    return (
        isinstance(x, np.ndarray)
        and isinstance(y, np.ndarray)
        and x.ndim == 2
        and y.ndim == 2
        and x.shape[0] == 1
        and y.shape[1] == 1
    )


def _random_waves(
    rng: np.random.Generator, amplitudes: tuple[float, ...], wavelengths: tuple[float, float]
) -> _Waves:
    """Plane waves with the given amplitudes, random directions, wavelengths and phases."""
    count = len(amplitudes)
    wavenumber = 2 * np.pi / rng.uniform(*wavelengths, count)
    direction = rng.uniform(0, np.pi, count)
    return _Waves(
        kx=wavenumber * np.cos(direction),
        ky=wavenumber * np.sin(direction),
        phase=rng.uniform(0, 2 * np.pi, count),
        amplitude=np.asarray(amplitudes, dtype=float),
    )


def _unit_field(rng: np.random.Generator, wavelengths: tuple[float, float]) -> _Waves:
    """A smooth random field of zero mean and unit variance (six plane waves)."""
    return _random_waves(rng, (math.sqrt(2 / 6),) * 6, wavelengths)


def _wander(rng: np.random.Generator, amplitudes: tuple[float, ...]) -> _Waves:
    """A smooth 1-D wander: harmonic i + 1 of the unit interval has amplitude amplitudes[i]."""
    count = len(amplitudes)
    return _Waves(
        kx=2 * np.pi * np.arange(1, count + 1),
        ky=np.zeros(count),
        phase=rng.uniform(0, 2 * np.pi, count),
        amplitude=np.asarray(amplitudes, dtype=float),
    )


@dataclass(frozen=True, eq=False)
class DemoWorld:
    """Everything the seed decides about the invented world, built once by :func:`build_world`."""

    options: DemoArchiveOptions
    grid: TileGrid
    blend_m: float
    west_border: _Waves
    north_border: _Waves
    coast_wander: _Waves
    hills: _Waves
    farmland: _Waves
    fen: _Waves
    shore: _Waves
    forest_field: _Waves
    lake_field: _Waves
    canopy_field: _Waves
    roof_salt: int


def build_world(options: DemoArchiveOptions) -> DemoWorld:
    """The world of a seed: province borders, relief and land-cover fields (all deterministic)."""
    rng = np.random.default_rng([options.seed, RandomStream.WORLD])
    grid = tile_layout(options)
    return DemoWorld(
        options=options,
        grid=grid,
        blend_m=min(600.0, 0.12 * min(grid.width_m, grid.height_m)),
        west_border=_wander(rng, (0.025, 0.015, 0.008)),
        north_border=_wander(rng, (0.025, 0.015, 0.008)),
        coast_wander=_wander(rng, (0.02, 0.012, 0.006)),
        hills=_random_waves(rng, (60.0, 45.0, 30.0, 15.0), (650.0, 1500.0)),
        farmland=_random_waves(rng, (12.0, 8.0, 5.0), (1500.0, 4000.0)),
        fen=_random_waves(rng, (0.8, 0.5, 0.2), (800.0, 2500.0)),
        shore=_random_waves(rng, (1.5, 1.0), (400.0, 1200.0)),
        forest_field=_unit_field(rng, (200.0, 600.0)),
        lake_field=_unit_field(rng, (250.0, 700.0)),
        canopy_field=_unit_field(rng, (60.0, 200.0)),
        roof_salt=int(rng.integers(0, 2**62)),
    )


@dataclass(frozen=True, eq=False)
class _Place:
    """Coordinates of a set of points: metres from the domain's north-west corner and unit ones.

    Either arrays of one shape (any points) or the axes of a regular grid (x and u of shape
    (1, n), y and v of shape (m, 1)), which broadcast to the (m, n) grid.
    """

    x: np.ndarray
    y: np.ndarray
    u: np.ndarray
    v: np.ndarray

    @property
    def shape(self) -> tuple[int, ...]:
        return np.broadcast_shapes(self.x.shape, self.y.shape)

    @property
    def is_grid(self) -> bool:
        return _is_grid(self.x, self.y)

    def subset(self, mask: np.ndarray) -> _Place:
        """The points where mask (of shape self.shape) is True, as 1-D arrays."""
        shape = self.shape
        return _Place(*(np.broadcast_to(a, shape)[mask] for a in (self.x, self.y, self.u, self.v)))


def _place(world: DemoWorld, easting: np.ndarray, northing: np.ndarray) -> _Place:
    grid = world.grid
    x = np.asarray(easting, dtype=float) - grid.west
    y = np.asarray(northing, dtype=float) - grid.north
    return _Place(x=x, y=y, u=x / grid.width_m, v=-y / grid.height_m)


def _only_where(mask: np.ndarray, field: Callable[[_Place], np.ndarray], at: _Place) -> np.ndarray:
    """field(at) where mask is True and NaN elsewhere (on a grid: everywhere, it is cheap)."""
    if not mask.any():
        return np.full(at.shape, np.nan)
    if at.is_grid or mask.all():
        return np.broadcast_to(field(at), at.shape)
    out = np.full(at.shape, np.nan)
    if mask.any():
        out[mask] = field(at.subset(mask))
    return out


class _Layout:
    """Where points lie in the province layout: metres west of the west/east border and north
    of the north/south border, the masks of those sides and the province weights.

    The full arrays are made only when asked for. On a grid the extremes of the distances come
    from the axes alone (the arithmetic is monotonic in each axis), so a tile away from the
    borders gets constant masks and weights without them.
    """

    def __init__(self, world: DemoWorld, at: _Place) -> None:
        self.world, self.at = world, at
        grid = world.grid
        self._west_axis = 0.5 + world.west_border(at.v)
        self._north_axis = 0.5 + world.north_border(at.u)
        if at.is_grid:
            u, v = at.u, at.v
            self.west_range = (
                (self._west_axis.min() - u.max()) * grid.width_m,
                (self._west_axis.max() - u.min()) * grid.width_m,
            )
            self.north_range = (
                (self._north_axis.min() - v.max()) * grid.height_m,
                (self._north_axis.max() - v.min()) * grid.height_m,
            )
        else:
            self.west_range = _extremes(self.to_west)
            self.north_range = _extremes(self.to_north)

    @cached_property
    def to_west(self) -> np.ndarray:
        full = (self._west_axis - self.at.u) * self.world.grid.width_m
        return np.broadcast_to(full, self.at.shape)

    @cached_property
    def to_north(self) -> np.ndarray:
        full = (self._north_axis - self.at.v) * self.world.grid.height_m
        return np.broadcast_to(full, self.at.shape)

    @cached_property
    def west(self) -> np.ndarray:
        """True west of the west/east border."""
        return self._positive(self.west_range, "to_west")

    @cached_property
    def north(self) -> np.ndarray:
        """True north of the north/south border."""
        return self._positive(self.north_range, "to_north")

    def _positive(self, extremes: tuple[float, float], name: str) -> np.ndarray:
        if extremes[0] > 0 or extremes[1] <= 0:
            return np.broadcast_to(np.bool_(extremes[0] > 0), self.at.shape)
        return np.asarray(getattr(self, name) > 0)

    @cached_property
    def weights(self) -> dict[str, np.ndarray]:
        blend = self.world.blend_m
        west_upland = self._step(self.west_range, blend, "to_west")
        west_lowland = self._step(self.west_range, blend / 4, "to_west")  # HF, TC: a few metres
        north = self._step(self.north_range, blend, "to_north")
        weights = {
            "SU": west_upland * north,
            "EW": (1 - west_upland) * north,
            "HF": west_lowland * (1 - north),
            "TC": (1 - west_lowland) * (1 - north),
        }
        shape = self.at.shape
        return {
            code: np.broadcast_to(np.asarray(w, dtype=float), shape) for code, w in weights.items()
        }

    def _step(self, extremes: tuple[float, float], width: float, name: str) -> float | np.ndarray:
        """_smoothstep(distance / width), a plain 0.0 or 1.0 when it is that everywhere."""
        if extremes[0] / width >= 1.0:  # division is monotonic
            return 1.0
        if extremes[1] / width <= 0.0:
            return 0.0
        return _smoothstep(getattr(self, name) / width)


def _extremes(values: np.ndarray) -> tuple[float, float]:
    if not values.size:
        return (math.inf, math.inf)
    return float(values.min()), float(values.max())


def _layout(world: DemoWorld, at: _Place) -> _Layout:
    return _Layout(world, at)


def _border_distances(world: DemoWorld, at: _Place) -> tuple[np.ndarray, np.ndarray]:
    """Metres west of the west/east border and north of the north/south border."""
    layout = _Layout(world, at)
    return layout.to_west, layout.to_north


def _smoothstep(z: np.ndarray) -> np.ndarray:
    """0 for z <= 0, 1 for z >= 1, a C1 cubic in between."""
    z = np.clip(z, 0.0, 1.0)
    return z * z * (3.0 - 2.0 * z)


def province_weights(
    world: DemoWorld, easting: np.ndarray, northing: np.ndarray
) -> dict[str, np.ndarray]:
    """Smooth membership (0..1, summing to 1) of each point in SU, EW, HF and TC."""
    weights = _layout(world, _place(world, easting, northing)).weights
    return {code: np.array(weight) for code, weight in weights.items()}


def _disc_distance(world: DemoWorld, at: _Place, disc: tuple[float, float, float]) -> np.ndarray:
    """Distance from a layout disc's centre in units of its radius (< 1 inside)."""
    u0, v0, radius = disc
    grid = world.grid
    dx = at.x - u0 * grid.width_m
    dy = -at.y - v0 * grid.height_m
    return np.hypot(dx, dy) / (radius * min(grid.width_m, grid.height_m))


def _island_height(world: DemoWorld, at: _Place) -> np.ndarray:
    """Height of the Tarn Coast island bump above sea level (negative off the island)."""
    sigma = _ISLAND[2] / math.sqrt(2 * math.log(_ISLAND_PEAK_M / _ISLAND_DROP_M))
    r = _disc_distance(world, at, (_ISLAND[0], _ISLAND[1], sigma))
    return _ISLAND_PEAK_M * np.exp(-0.5 * r**2) - _ISLAND_DROP_M


def _inland(world: DemoWorld, at: _Place) -> np.ndarray:
    """How far inland of the coastline a point lies, in unit coordinates (negative at sea)."""
    wander = world.coast_wander
    if at.is_grid:  # the wander of u - v, as plane waves in (u, v)
        along = _Waves(wander.kx, -wander.kx, wander.phase, wander.amplitude)(at.u, at.v)
    else:
        along = wander(at.u - at.v)
    return _COAST_LEVEL + along - (at.u + at.v - 1.0)


def _maybe_sea(world: DemoWorld, at: _Place) -> np.ndarray:
    """False where the coastline cannot reach (the wander is bounded by its amplitudes)."""
    reach = float(np.abs(world.coast_wander.amplitude).sum()) + 1e-9
    return np.broadcast_to(at.u + at.v - 1.0 > _COAST_LEVEL - reach, at.shape)


def _coast_heights(world: DemoWorld, at: _Place) -> np.ndarray:
    """Tarn Coast relief: land sloping to a sea at height 0, with one island."""
    inland = _inland(world, at)
    land = 15.0 * inland / 0.6 + world.shore(at.x, at.y) * np.clip(inland / 0.2, 0.0, 1.0)
    if at.is_grid and _island_below_sea(world, at):
        return np.maximum(land, 0.0)  # the same: max(land, island, 0) with island < 0
    return np.maximum(np.maximum(land, _island_height(world, at)), 0.0)


def _island_below_sea(world: DemoWorld, at: _Place) -> bool:
    """True if the island bump is under the sea at every point of a grid (its nearest point)."""
    grid = world.grid
    dx = at.x - _ISLAND[0] * grid.width_m
    dy = -at.y - _ISLAND[1] * grid.height_m
    nearest = _Place(
        x=np.array([dx.flat[np.argmin(np.abs(dx))] + _ISLAND[0] * grid.width_m]),
        y=np.array([-(dy.flat[np.argmin(np.abs(dy))] + _ISLAND[1] * grid.height_m)]),
        u=np.zeros(1),
        v=np.zeros(1),
    )
    return bool(_island_height(world, nearest)[0] < 0)


def _reliefs(world: DemoWorld) -> dict[str, Callable[[_Place], np.ndarray]]:
    return {
        "SU": lambda at: 160.0 + world.hills(at.x, at.y),
        "EW": lambda at: 65.0 + world.farmland(at.x, at.y),
        "HF": lambda at: 3.5 + world.fen(at.x, at.y),
        "TC": lambda at: _coast_heights(world, at),
    }


def _terrain(world: DemoWorld, at: _Place, layout: _Layout) -> np.ndarray:
    """Sum of the provinces' reliefs by weight; a relief is evaluated only where it weighs."""
    total = np.zeros(at.shape)  # + a term: the term exactly (0.0 + x == x)
    first = True
    for code, relief in _reliefs(world).items():
        weight = layout.weights[code]
        if not weight.any():
            continue
        weighs = weight != 0
        if at.is_grid or weighs.all():
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
    at = _place(world, easting, northing)
    return _terrain(world, at, _layout(world, at))


def terrain_slope(
    world: DemoWorld, easting: np.ndarray, northing: np.ndarray, *, step_m: float = 0.5
) -> np.ndarray:
    """tan(slope) of the true terrain (dimensionless), by central differences of step_m metres."""
    e = np.asarray(easting, dtype=float)
    n = np.asarray(northing, dtype=float)
    d_east = true_terrain(world, e + step_m, n) - true_terrain(world, e - step_m, n)
    d_north = true_terrain(world, e, n + step_m) - true_terrain(world, e, n - step_m)
    return np.hypot(d_east, d_north) / (2 * step_m)


def province_index(world: DemoWorld, easting: np.ndarray, northing: np.ndarray) -> np.ndarray:
    """Index into PROVINCES (0 SU, 1 EW, 2 HF, 3 TC) of the province layout at each point.

    This is the quadrant layout only; the administrative enclave and the sea are ignored.
    """
    to_west, to_north = _border_distances(world, _place(world, easting, northing))
    return np.where(to_north > 0, 0, 2) + np.where(to_west > 0, 0, 1)


def land_cover(world: DemoWorld, easting: np.ndarray, northing: np.ndarray) -> np.ndarray:
    """Land-cover class (uint8, see LandCover) of the world at EPSG:32632 points; never 0."""
    at = _place(world, easting, northing)
    return _land_cover(world, at, _layout(world, at))


def _land_cover(world: DemoWorld, at: _Place, layout: _Layout) -> np.ndarray:
    west, north = layout.west, layout.north
    forest = _only_where(north, lambda p: world.forest_field(p.x, p.y), at)
    classes = np.full(at.shape, LandCover.OPEN_GROUND, dtype=np.uint8)
    classes[(west & north & (forest > -0.7)) | (~west & north & (forest > 1.1))] = LandCover.FOREST
    south_east = ~west & ~north
    town = south_east & (
        _only_where(south_east, lambda p: _disc_distance(world, p, _TOWN), at) < 1.0
    )
    classes[town] = LandCover.BUILT_UP
    classes[_water(world, at, layout)] = LandCover.WATER
    return classes


def _water(world: DemoWorld, at: _Place, layout: _Layout) -> np.ndarray:
    """True on the sea (off the island) and on the lakes of Harrow Fen."""
    inland = _only_where(_maybe_sea(world, at), lambda p: _inland(world, p), at)
    offshore = inland < 0
    island = _only_where(offshore, lambda p: _island_height(world, p), at)
    sea = offshore & (island <= 0)
    fen = layout.west & ~layout.north & (layout.weights["HF"] > 0.8)
    lakes = fen & (_only_where(fen, lambda p: world.lake_field(p.x, p.y), at) > 1.0)
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
    return _cover_heights(world, _place(world, easting, northing), classes)


def _cover_heights(world: DemoWorld, at: _Place, classes: np.ndarray) -> np.ndarray:
    low, high = CANOPY_RANGE_M
    forest = classes == LandCover.FOREST
    built_up = classes == LandCover.BUILT_UP

    def canopy(p: _Place) -> np.ndarray:
        return (low + high) / 2 + (high - low) / 2 * np.tanh(world.canopy_field(p.x, p.y))

    def roofs(p: _Place) -> np.ndarray:
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
        heights = np.where(forest, _only_where(forest, canopy, at), heights)
    if built_up.any():
        roof = _only_where(built_up, roofs, at)
        heights = np.where(built_up & ~np.isnan(roof), roof, heights)
    return heights


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

    The smooth fields are evaluated on the tile's grid axes (see _Waves._on_grid); the random
    errors come from the (seed, stream, col, row) streams, drawn for the whole tile.
    """
    options = world.options
    easting, northing = world.grid.pixel_axes(col, row)
    shape = (options.pixels, options.pixels)
    seen_e = easting - options.shift_east_m
    seen_n = northing - options.shift_north_m
    at = _place(world, seen_e, seen_n)
    layout = _layout(world, at)
    classes = _land_cover(world, at, layout)
    heights = _terrain(world, at, layout) + options.vertical_bias_m
    if options.canopy:
        heights += _cover_heights(world, at, classes)
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
    the test domain. The terrain is evaluated only where it is kept.
    """
    options = world.options
    grid = world.grid
    easting = np.asarray(easting, dtype=float)
    northing = np.asarray(northing, dtype=float)
    noise = np.zeros(easting.shape)
    if not options.clean:
        rng = np.random.default_rng([options.seed, RandomStream.REFERENCE, *tile_key])
        noise = LIDAR_NOISE_M * rng.standard_normal(easting.shape)
    covered = (
        (easting >= grid.west - margin_m)
        & (easting <= grid.west + grid.width_m + margin_m)
        & (northing <= grid.north + margin_m)
        & (northing >= grid.north - grid.height_m - margin_m)
    )
    heights = np.full(easting.shape, np.nan)
    if not covered.any():
        return heights
    at = _place(world, easting[covered], northing[covered])
    layout = _layout(world, at)
    land = ~_water(world, at, layout)
    if land.all():
        kept = _terrain(world, at, layout)
    else:
        on_land = at.subset(land)
        kept = np.full(at.shape, np.nan)
        kept[land] = _terrain(world, on_land, _layout(world, on_land))
    heights[covered] = kept + noise[covered]
    return heights


def province_geometries(world: DemoWorld, *, points: int = 200) -> dict[str, BaseGeometry]:
    """Province outlines (shapely, EPSG:32632 metres) following the same layout as the terrain.

    The quadrants reach two test pixels beyond the domain; the sea belongs to no province, TC is
    mainland plus an island (a MultiPolygon) and HF has a hole (an enclave of no province).
    """
    grid = world.grid
    pad_u = 2 * grid.pixel_size_m / grid.width_m
    pad_v = 2 * grid.pixel_size_m / grid.height_m
    lo, hi = -1.0, 2.0
    s = np.linspace(lo, hi, 3 * points)
    west = Polygon([(lo, lo), *zip(0.5 + world.west_border(s), s, strict=True), (lo, hi)])
    north = Polygon([(lo, lo), *zip(s, 0.5 + world.north_border(s), strict=True), (hi, lo)])
    domain = shapely.box(-pad_u, -pad_v, 1 + pad_u, 1 + pad_v)
    t = np.linspace(-1.5, 1.5, 3 * points)
    c = _COAST_LEVEL + world.coast_wander(t)
    sea = Polygon([*zip((c + 1 + t) / 2, (c + 1 - t) / 2, strict=True), (3.0, 3.0)])
    land = domain.difference(sea)
    unit = {
        "SU": land.intersection(west).intersection(north),
        "EW": land.intersection(north).difference(west),
        "HF": land.intersection(west).difference(north).difference(_unit_disc(_ENCLAVE, grid)),
        "TC": land.difference(west).difference(north).union(_unit_disc(_ISLAND, grid)),
    }
    to_metres = np.array([[grid.width_m, 0.0], [0.0, -grid.height_m]])
    step_m = min(grid.width_m, grid.height_m) / points
    return {
        code: shapely.segmentize(
            shapely.transform(
                geometry, lambda uv: uv @ to_metres + np.array([grid.west, grid.north])
            ),
            step_m,
        )
        for code, geometry in unit.items()
    }


def _unit_disc(disc: tuple[float, float, float], grid: TileGrid) -> BaseGeometry:
    """A layout disc as an ellipse in unit coordinates (a circle in metres)."""
    u0, v0, radius = disc
    side = min(grid.width_m, grid.height_m)
    circle = Point(0.0, 0.0).buffer(radius * side, 64)
    return shapely.transform(
        circle, lambda xy: xy / np.array([grid.width_m, grid.height_m]) + np.array([u0, v0])
    )
