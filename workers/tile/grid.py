"""A raster grid: CRS, affine transform and shape. The frame every per-tile array lives on."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from functools import cached_property, lru_cache

import numpy as np
from affine import Affine
from numpy.typing import NDArray
from pyproj import CRS
from rasterio.features import rasterize
from shapely.geometry import Polygon
from shapely.geometry.base import BaseGeometry


@lru_cache(maxsize=64)
def crs_of(wkt: str) -> CRS:
    """The pyproj CRS of a WKT, parsed once per process (parsing took 0.35 ms, asked for per
    tile; pyproj's CRS keeps its PROJ objects per thread, so one may be shared)."""
    return CRS.from_wkt(wkt)


@dataclass(frozen=True)
class Grid:
    """A north-up or rotated raster grid. ``crs`` is WKT; ``transform`` the 6 GDAL-order affine
    coefficients (a, b, c, d, e, f) mapping (col, row) of a pixel corner to (x, y)."""

    crs: str
    transform: tuple[float, float, float, float, float, float]
    width: int
    height: int

    @property
    def affine(self) -> Affine:
        return Affine(*self.transform)

    @property
    def shape(self) -> tuple[int, int]:
        return (self.height, self.width)

    @property
    def pyproj_crs(self) -> CRS:
        return crs_of(self.crs)

    @property
    def resolution(self) -> tuple[float, float]:
        a, b, _, d, e, _ = self.transform
        return (float(np.hypot(a, d)), float(np.hypot(b, e)))

    @cached_property
    def bounds(self) -> tuple[float, float, float, float]:
        """(left, bottom, right, top) of the grid's footprint in its CRS (computed once: the
        catalog asks for it many times per tile)."""
        corners = [self.affine @ (c, r) for c in (0, self.width) for r in (0, self.height)]
        xs, ys = zip(*corners, strict=True)
        return (min(xs), min(ys), max(xs), max(ys))

    def expanded(self, pixels: int) -> Grid:
        """The grid grown by ``pixels`` on every side."""
        a, b, c, d, e, f = self.transform
        c2, f2 = c - pixels * (a + b), f - pixels * (d + e)
        return Grid(
            self.crs, (a, b, c2, d, e, f2), self.width + 2 * pixels, self.height + 2 * pixels
        )

    def pixel_size_m(self) -> tuple[float, float]:
        """Pixel width and height in metres (geographic grids: at the grid's centre latitude)."""
        res_x, res_y = self.resolution
        crs = self.pyproj_crs
        if crs.is_geographic:
            lat = np.radians(0.5 * (self.bounds[1] + self.bounds[3]))
            return res_x * 111_320.0 * float(np.cos(lat)), res_y * 110_574.0
        factor = crs.axis_info[0].unit_conversion_factor if crs.axis_info else 1.0
        return res_x * factor, res_y * factor

    def centre_coordinates(self) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Map coordinates (x, y) of every pixel centre, each of the grid's shape."""
        rows, cols = np.indices(self.shape, dtype=np.float64)
        return self.pixel_centres(rows, cols)

    def pixel_centres(
        self, rows: NDArray[np.float64], cols: NDArray[np.float64]
    ) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Map coordinates of the centres of pixels (rows, cols), broadcasting the inputs."""
        a, b, c, d, e, f = self.transform
        cc, rr = cols + 0.5, rows + 0.5
        return a * cc + b * rr + c, d * cc + e * rr + f


def centres_in(geometries: Sequence[BaseGeometry], grid: Grid) -> NDArray[np.bool_]:
    """True for pixels of grid whose centre lies in one of the geometries (grid's CRS)."""
    if not geometries:
        return np.zeros(grid.shape, dtype=bool)
    whole = _all_or_none(geometries, grid)
    if whole is not None:
        return np.full(grid.shape, whole, dtype=bool)
    burned = rasterize(
        [(g, 1) for g in geometries],
        out_shape=grid.shape,
        transform=grid.affine,
        fill=0,
        all_touched=False,
        dtype="uint8",
    )
    return burned.astype(bool)


def _all_or_none(geometries: Sequence[BaseGeometry], grid: Grid) -> bool | None:
    """True when a geometry holds every pixel centre in its interior, False when none touches
    any, None when only rasterizing tells (a tile wholly inside one region is the common case
    and needs no rasterizing)."""
    if min(grid.shape) < 2:
        return None
    hull = _centres_hull(grid)
    if any(g.contains_properly(hull) for g in geometries):
        return True
    if all(g.disjoint(hull) for g in geometries):
        return False
    return None


def _centres_hull(grid: Grid) -> BaseGeometry:
    """The convex hull of grid's pixel centres (the parallelogram through the four corner
    pixels' centres): a geometry holding it in its interior holds every centre."""
    cols = np.array([0, grid.width - 1, grid.width - 1, 0], dtype=np.float64) + 0.5
    rows = np.array([0, 0, grid.height - 1, grid.height - 1], dtype=np.float64) + 0.5
    a, b, c, d, e, f = grid.transform
    return Polygon(zip(a * cols + b * rows + c, d * cols + e * rows + f, strict=True))
