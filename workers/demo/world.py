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
from collections.abc import Callable
from dataclasses import dataclass
from functools import cached_property

import numpy as np
import shapely
from shapely.geometry import Point, Polygon
from shapely.geometry.base import BaseGeometry

from demaudit.workers.demo.options import DemoArchiveOptions, RandomStream, TileGrid, tile_layout
from demaudit.workers.demo.waves import Waves, is_grid, random_waves, unit_field, wander

# Layout in unit coordinates (u east, v south); radii in units of the shorter domain side.
TOWN = (0.72, 0.70, 0.08)
ENCLAVE = (0.22, 0.78, 0.05)
ISLAND = (0.90, 0.90, 0.022)
COAST_LEVEL = 0.64


@dataclass(frozen=True, eq=False)
class DemoWorld:
    """Everything the seed decides about the invented world, built once by :func:`build_world`."""

    options: DemoArchiveOptions
    grid: TileGrid
    blend_m: float
    west_border: Waves
    north_border: Waves
    coast_wander: Waves
    hills: Waves
    farmland: Waves
    fen: Waves
    shore: Waves
    forest_field: Waves
    lake_field: Waves
    canopy_field: Waves
    roof_salt: int


def build_world(options: DemoArchiveOptions) -> DemoWorld:
    """The world of a seed: province borders, relief and land-cover fields (all deterministic)."""
    rng = np.random.default_rng([options.seed, RandomStream.WORLD])
    grid = tile_layout(options)
    return DemoWorld(
        options=options,
        grid=grid,
        blend_m=min(600.0, 0.12 * min(grid.width_m, grid.height_m)),
        west_border=wander(rng, (0.025, 0.015, 0.008)),
        north_border=wander(rng, (0.025, 0.015, 0.008)),
        coast_wander=wander(rng, (0.02, 0.012, 0.006)),
        hills=random_waves(rng, (60.0, 45.0, 30.0, 15.0), (650.0, 1500.0)),
        farmland=random_waves(rng, (12.0, 8.0, 5.0), (1500.0, 4000.0)),
        fen=random_waves(rng, (0.8, 0.5, 0.2), (800.0, 2500.0)),
        shore=random_waves(rng, (1.5, 1.0), (400.0, 1200.0)),
        forest_field=unit_field(rng, (200.0, 600.0)),
        lake_field=unit_field(rng, (250.0, 700.0)),
        canopy_field=unit_field(rng, (60.0, 200.0)),
        roof_salt=int(rng.integers(0, 2**62)),
    )


@dataclass(frozen=True, eq=False)
class Place:
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
        return is_grid(self.x, self.y)

    @property
    def dense(self) -> bool:
        """True for a grid's axes or a 2-D raster of positions: fields are evaluated at every
        point there (by the fast paths of Waves) and masks then select, instead of subsetting."""
        return self.is_grid or (self.x.ndim == 2 and self.x.shape == self.y.shape)

    def subset(self, mask: np.ndarray) -> Place:
        """The points where mask (of shape self.shape) is True, as 1-D arrays."""
        shape = self.shape
        return Place(*(np.broadcast_to(a, shape)[mask] for a in (self.x, self.y, self.u, self.v)))


def place(world: DemoWorld, easting: np.ndarray, northing: np.ndarray) -> Place:
    grid = world.grid
    x = np.asarray(easting, dtype=float) - grid.west
    y = np.asarray(northing, dtype=float) - grid.north
    return Place(x=x, y=y, u=x / grid.width_m, v=-y / grid.height_m)


def only_where(mask: np.ndarray, field: Callable[[Place], np.ndarray], at: Place) -> np.ndarray:
    """field(at) where mask is True and NaN elsewhere (on a dense Place: everywhere)."""
    if not mask.any():
        return np.full(at.shape, np.nan)
    if at.dense or mask.all():
        return np.broadcast_to(field(at), at.shape)
    out = np.full(at.shape, np.nan)
    if mask.any():
        out[mask] = field(at.subset(mask))
    return out


class ProvinceLayout:
    """Where points lie in the province layout: metres west of the west/east border and north
    of the north/south border, the masks of those sides and the province weights.

    The full arrays are made only when asked for. On a grid the extremes of the distances come
    from the axes alone (the arithmetic is monotonic in each axis), so a tile away from the
    borders gets constant masks and weights without them.
    """

    def __init__(self, world: DemoWorld, at: Place) -> None:
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
        if self.at.is_grid:
            grid = self.world.grid
            if name == "to_west":
                return _banded_smoothstep(self._west_axis, self.at.u, grid.width_m, width)
            return _banded_smoothstep(self._north_axis, self.at.v, grid.height_m, width)
        return _smoothstep(getattr(self, name) / width)


def _banded_smoothstep(
    border: np.ndarray, position: np.ndarray, scale: float, width: float
) -> np.ndarray:
    """_smoothstep((border - position) * scale / width) on a grid, border along one axis and
    position along the other, computed only in the band of positions where some value lies
    strictly between 0 and 1 (elsewhere it is exactly 1.0 or 0.0; the arithmetic is monotonic
    in the border, so its extremes decide). Equal to the full computation, value for value."""
    low = (border.min() - position) * scale / width
    high = (border.max() - position) * scale / width
    shape = np.broadcast_shapes(border.shape, position.shape)
    out = np.broadcast_to(np.where(low >= 1.0, 1.0, 0.0), shape).copy()
    band = np.flatnonzero((high > 0.0) & (low < 1.0))
    if band.size:
        axis = 1 if position.shape[0] == 1 else 0
        values = _smoothstep((border - np.take(position, band, axis=axis)) * scale / width)
        if axis == 1:
            out[:, band] = values
        else:
            out[band, :] = values
    return out


def _extremes(values: np.ndarray) -> tuple[float, float]:
    if not values.size:
        return (math.inf, math.inf)
    return float(values.min()), float(values.max())


def province_layout(world: DemoWorld, at: Place) -> ProvinceLayout:
    return ProvinceLayout(world, at)


def _border_distances(world: DemoWorld, at: Place) -> tuple[np.ndarray, np.ndarray]:
    """Metres west of the west/east border and north of the north/south border."""
    layout = ProvinceLayout(world, at)
    return layout.to_west, layout.to_north


def _smoothstep(z: np.ndarray) -> np.ndarray:
    """0 for z <= 0, 1 for z >= 1, a C1 cubic in between."""
    z = np.clip(z, 0.0, 1.0)
    return z * z * (3.0 - 2.0 * z)


def province_weights(
    world: DemoWorld, easting: np.ndarray, northing: np.ndarray
) -> dict[str, np.ndarray]:
    """Smooth membership (0..1, summing to 1) of each point in SU, EW, HF and TC."""
    weights = province_layout(world, place(world, easting, northing)).weights
    return {code: np.array(weight) for code, weight in weights.items()}


def province_index(world: DemoWorld, easting: np.ndarray, northing: np.ndarray) -> np.ndarray:
    """Index into PROVINCES (0 SU, 1 EW, 2 HF, 3 TC) of the province layout at each point.

    This is the quadrant layout only; the administrative enclave and the sea are ignored.
    """
    to_west, to_north = _border_distances(world, place(world, easting, northing))
    return np.where(to_north > 0, 0, 2) + np.where(to_west > 0, 0, 1)


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
    c = COAST_LEVEL + world.coast_wander(t)
    sea = Polygon([*zip((c + 1 + t) / 2, (c + 1 - t) / 2, strict=True), (3.0, 3.0)])
    land = domain.difference(sea)
    unit = {
        "SU": land.intersection(west).intersection(north),
        "EW": land.intersection(north).difference(west),
        "HF": land.intersection(west).difference(north).difference(_unit_disc(ENCLAVE, grid)),
        "TC": land.difference(west).difference(north).union(_unit_disc(ISLAND, grid)),
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
