"""Where the demo archive's files lie beyond the test tiling: the lidar tiling (EPSG:3035), the
EGM96 geoid, and the lattice on which map projections and the geoid are evaluated.

Map projections and the geoid are evaluated on a lattice every LATTICE_STEP_PX pixels and
interpolated bilinearly (PROJ per pixel cost more than the terrain itself): the interpolated
EPSG:32632 positions of the lidar pixels are within 1e-6 m of PROJ's, the geoid within 1e-5 m
(measured on 1000 px tiles). The geoid adapter and the transformers are made once per process.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import pyproj
from rasterio.transform import Affine

from demaudit.workers.demo.options import REFERENCE_CRS, TEST_CRS, DemoArchiveOptions, tile_layout
from demaudit.workers.tile.datum import DEFAULT_GRID_DIRS, geoid_undulation

_GEOID_PROBE = (482_400.0, 6_227_600.0)  # a point of the demo domain, EPSG:32632
#: Pixels between the lattice nodes where PROJ evaluates positions and the geoid.
LATTICE_STEP_PX = 8


class Egm96Geoid:
    """EGM96 geoid undulation N (metres) at EPSG:32632 points: ellipsoidal = orthometric + N.

    A thin adapter over :func:`demaudit.workers.tile.datum.geoid_undulation`, which refuses to run
    without the grid (GeoidGridError), so the demo never silently skips the geoid.
    """

    def __init__(self, *, grid_dirs: tuple[str, ...] = DEFAULT_GRID_DIRS) -> None:
        self._grid_dirs = grid_dirs
        self._to_lonlat = pyproj.Transformer.from_crs(TEST_CRS, "EPSG:4326", always_xy=True)
        self.undulation(np.array([_GEOID_PROBE[0]]), np.array([_GEOID_PROBE[1]]))

    def undulation(self, easting: np.ndarray, northing: np.ndarray) -> np.ndarray:
        """N in metres at EPSG:32632 eastings/northings (any array shape)."""
        lon, lat = self._to_lonlat.transform(np.asarray(easting), np.asarray(northing))
        return geoid_undulation(lon, lat, vertical_crs="EPSG:5773", grid_dirs=self._grid_dirs)


@dataclass(frozen=True)
class ReferenceGrid:
    """The lidar tiling on EPSG:3035 (metres); tile (col, row) spans x from offset + col * size.

    Rows count north from the y-origin (row r spans y from offset + r * size upwards).
    """

    pixel_size_m: float
    tile_pixels: int
    offset_m: float
    cols: range
    rows: range

    @property
    def tile_size_m(self) -> float:
        return self.tile_pixels * self.pixel_size_m

    def tiles(self) -> Iterator[tuple[int, int]]:
        """(col, row) of every tile, from the north-west."""
        for row in reversed(self.rows):
            for col in self.cols:
                yield col, row

    def tile_origin(self, col: int, row: int) -> tuple[float, float]:
        """x and y of the tile's north-west corner."""
        return self.offset_m + col * self.tile_size_m, self.offset_m + (row + 1) * self.tile_size_m

    def tile_id(self, col: int, row: int) -> str:
        west, north = self.tile_origin(col, row)
        return f"l21_E{west:.0f}_N{north:.0f}"

    def transform(self, col: int, row: int) -> Affine:
        west, north = self.tile_origin(col, row)
        return north_up(west, north, self.pixel_size_m)

    def pixel_centres(self, col: int, row: int) -> tuple[np.ndarray, np.ndarray]:
        """EPSG:3035 x and y of every pixel centre of a tile, as (tile_pixels, tile_pixels)."""
        west, north = self.tile_origin(col, row)
        offsets = (np.arange(self.tile_pixels) + 0.5) * self.pixel_size_m
        x, y = np.meshgrid(west + offsets, north - offsets)
        return x, y


def reference_margin_m(options: DemoArchiveOptions) -> float:
    """How far (metres) the lidar coverage reaches beyond the test domain: 6 lidar pixels."""
    return 6 * reference_pixel_size_m(options)


def reference_pixel_size_m(options: DemoArchiveOptions) -> float:
    """Lidar pixel size (metres): 0.8 x the test pixel (4 m for 5 m)."""
    return round(0.8 * options.pixel_size_m, 9)


def reference_layout(options: DemoArchiveOptions) -> ReferenceGrid:
    """The lidar tiling: pixels 0.8 x the test pixel, tiles about 0.7 x the test tile side,
    origin offset by a third of a tile, covering the test domain plus reference_margin_m."""
    pixel = reference_pixel_size_m(options)
    tile_pixels = max(8, round(0.7 * options.pixels * options.pixel_size_m / pixel))
    offset = round(tile_pixels / 3) * pixel
    size = tile_pixels * pixel
    grid = tile_layout(options)
    margin = reference_margin_m(options) + pixel
    to_reference = pyproj.Transformer.from_crs(TEST_CRS, REFERENCE_CRS, always_xy=True)
    left, bottom, right, top = to_reference.transform_bounds(
        grid.west - margin,
        grid.north - grid.height_m - margin,
        grid.west + grid.width_m + margin,
        grid.north + margin,
        densify_pts=64,
    )
    return ReferenceGrid(
        pixel_size_m=pixel,
        tile_pixels=tile_pixels,
        offset_m=offset,
        cols=range(math.floor((left - offset) / size), math.floor((right - offset) / size) + 1),
        rows=range(math.floor((bottom - offset) / size), math.floor((top - offset) / size) + 1),
    )


def north_up(west: float, north: float, pixel_size: float) -> Affine:
    """Geotransform of a north-up raster with square pixels."""
    return Affine(pixel_size, 0.0, west, 0.0, -pixel_size, north)


@lru_cache(maxsize=1)
def process_geoid() -> Egm96Geoid:
    """One geoid adapter per process."""
    return Egm96Geoid()


@lru_cache(maxsize=4)
def transformer(source: str, target: str) -> pyproj.Transformer:
    return pyproj.Transformer.from_crs(source, target, always_xy=True)


def _lattice(pixels: int, step: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Lattice nodes of a tile side and where its pixel centres fall between them.

    Node positions are in pixels from the tile's edge: the first at the first pixel centre, one
    every ``step`` pixels, the last at or beyond the last pixel centre. Returns the positions,
    the index of the node left of each pixel centre and its weight for the right node (0..1).
    """
    nodes = max(2, math.ceil((pixels - 1) / step) + 1)
    position = 0.5 + step * np.arange(nodes)
    left = np.minimum(np.arange(pixels) // step, nodes - 2)
    t = (np.arange(pixels) + 0.5 - position[left]) / step
    return position, left, t


def on_lattice(
    function: Callable[[np.ndarray, np.ndarray], tuple[np.ndarray, ...]],
    *,
    west: float,
    north: float,
    pixel_size: float,
    pixels: int,
) -> tuple[np.ndarray, ...]:
    """function(x, y) of a north-up square tile's pixel centres, evaluated every
    LATTICE_STEP_PX pixels and interpolated bilinearly; each result is (pixels, pixels)."""
    position, left, t = _lattice(pixels, LATTICE_STEP_PX)
    x, y = np.meshgrid(west + position * pixel_size, north - position * pixel_size)
    out = []
    for values in function(x, y):
        nodes = np.asarray(values, dtype=float)
        rows = (1.0 - t)[:, None] * nodes[left] + t[:, None] * nodes[left + 1]
        out.append((1.0 - t) * rows[:, left] + t * rows[:, left + 1])
    return tuple(out)
