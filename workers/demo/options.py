"""What a demo archive is made of: its options, the random streams of its seed, its land-cover
classes and the regular tiling of the test release (EPSG:32632 metres, row 0 north).

Heights are in metres; NODATA is what the archive writer puts where a value is missing.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from enum import IntEnum

import numpy as np

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
