"""The GeoTIFF tiles of the demo archive: each test tile (ellipsoidal heights) with its land
cover and, when tilted, its corrected update tile; each lidar tile (EGM96 heights). One call
makes and writes one tile, so memory does not grow with the archive."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
from rasterio.transform import Affine

from demaudit.workers.demo.grids import (
    ReferenceGrid,
    north_up,
    on_lattice,
    process_geoid,
    reference_margin_m,
    transformer,
)
from demaudit.workers.demo.options import (
    LIDAR_NOISE_M,
    NODATA,
    REFERENCE_CRS,
    TEST_CRS,
    TileGrid,
    tilted_tiles,
)
from demaudit.workers.demo.release import VoidDisc, reference_heights, release_tile
from demaudit.workers.demo.world import DemoWorld

RELEASE_DIR = "release_2026_11"
UPDATE_DIR = "release_2026_11_update"
REFERENCE_DIR = "lidar_2021"
LANDCOVER_DIR = "landcover"


def write_raster(
    path: Path,
    array: np.ndarray,
    *,
    crs: str,
    transform: Affine,
    nodata: float,
    tags: dict[str, str],
) -> None:
    """One single-band GeoTIFF: deflate (predictor 3 for floats), 256 blocks if big enough."""
    height, width = array.shape
    floating = np.issubdtype(array.dtype, np.floating)
    profile: dict[str, Any] = {
        "driver": "GTiff",
        "width": width,
        "height": height,
        "count": 1,
        "dtype": array.dtype.name,
        "crs": crs,
        "transform": transform,
        "nodata": nodata,
        "compress": "deflate",
        "zlevel": 1,  # as small as level 6 for noisy heights (measured), 40 % faster
        "predictor": 3 if floating else 1,
    }
    if min(width, height) >= 256:
        profile.update(tiled=True, blockxsize=256, blockysize=256)
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(array, 1)
        dst.update_tags(**tags)
        if floating:
            dst.units = ("metre",)


_RELEASE_TAGS = {
    "product": "Valdmark Survey Office release 2026-11 (invented demo data)",
    "vertical_crs": "ellipsoidal height, WGS 84 (EPSG:4979)",
}


_LANDCOVER_TAGS = {"classes": "1 open ground, 2 forest, 3 built-up, 4 water; 0 nodata"}


_REFERENCE_TAGS = {
    "product": "Valdmark Survey Office lidar 2021 terrain model (invented demo data)",
    "vertical_crs": "EGM96 height (EPSG:5773)",
}


@dataclass
class ReleaseSummary:
    """What the release writer injected, for the truth file."""

    blunders: int = 0
    voids: list[dict[str, Any]] = field(default_factory=list)
    update_tiles: list[str] = field(default_factory=list)


def write_release_tile(out_dir: Path, world: DemoWorld, col: int, row: int) -> dict[str, Any]:
    """One test tile (ellipsoidal float32), its land cover and, if tilted, its corrected update.

    Returns what the truth file needs: blunders, void records and the update tile's id or None.
    """
    grid, options = world.grid, world.options
    tile = release_tile(world, col, row)
    tile_id = grid.tile_id(col, row)
    west, north = grid.tile_origin(col, row)
    transform = north_up(west, north, grid.pixel_size_m)
    geoid = process_geoid()
    (undulation,) = on_lattice(
        lambda e, n: (geoid.undulation(e, n),),
        west=west,
        north=north,
        pixel_size=grid.pixel_size_m,
        pixels=grid.pixels,
    )
    delivered = _to_float32(tile.heights + tile.ramp + undulation)
    write_raster(
        out_dir / RELEASE_DIR / f"{tile_id}.tif",
        delivered,
        crs=TEST_CRS,
        transform=transform,
        nodata=NODATA,
        tags=_RELEASE_TAGS,
    )
    write_raster(
        out_dir / LANDCOVER_DIR / f"{tile_id}.tif",
        tile.land_cover,
        crs=TEST_CRS,
        transform=transform,
        nodata=0,
        tags=_LANDCOVER_TAGS,
    )
    update = None
    if options.write_update and (col, row) in tilted_tiles(options):
        corrected = _to_float32(tile.heights + undulation)
        write_raster(
            out_dir / UPDATE_DIR / f"{tile_id}.tif",
            corrected,
            crs=TEST_CRS,
            transform=transform,
            nodata=NODATA,
            tags=_RELEASE_TAGS,
        )
        update = tile_id
    return {
        "blunders": tile.blunders,
        "voids": [_void_record(grid, tile_id, col, row, disc) for disc in tile.voids],
        "update": update,
    }


def _to_float32(heights: np.ndarray) -> np.ndarray:
    return np.where(np.isnan(heights), NODATA, heights).astype(np.float32)


def _void_record(
    grid: TileGrid, tile_id: str, col: int, row: int, disc: VoidDisc
) -> dict[str, Any]:
    west, north = grid.tile_origin(col, row)
    return {
        "tile": tile_id,
        "easting": round(west + disc.col * grid.pixel_size_m, 3),
        "northing": round(north - disc.row * grid.pixel_size_m, 3),
        "radius_m": round(disc.radius * grid.pixel_size_m, 3),
    }


def write_reference_tile(
    out_dir: Path, world: DemoWorld, layout: ReferenceGrid, col: int, row: int
) -> bool:
    """One lidar tile on EPSG:3035 (orthometric float32); False (nothing written) if it has
    no coverage."""
    west, north = layout.tile_origin(col, row)
    to_test = transformer(REFERENCE_CRS, TEST_CRS)
    easting, northing = on_lattice(
        lambda x, y: to_test.transform(x, y),
        west=west,
        north=north,
        pixel_size=layout.pixel_size_m,
        pixels=layout.tile_pixels,
    )
    margin = reference_margin_m(world.options)
    heights = reference_heights(world, easting, northing, tile_key=(col, row), margin_m=margin)
    if np.isnan(heights).all():
        return False
    write_raster(
        out_dir / REFERENCE_DIR / f"{layout.tile_id(col, row)}.tif",
        _to_float32(heights),
        crs=REFERENCE_CRS,
        transform=layout.transform(col, row),
        nodata=NODATA,
        tags=_REFERENCE_TAGS,
    )
    return True


def reference_summary(world: DemoWorld, layout: ReferenceGrid, *, written: int) -> dict[str, Any]:
    """The lidar part of the truth file."""
    return {
        "crs": REFERENCE_CRS,
        "vertical_crs": "EPSG:5773",
        "pixel_size_m": layout.pixel_size_m,
        "tile_pixels": layout.tile_pixels,
        "tiling_origin_offset_m": layout.offset_m,
        "coverage_margin_m": reference_margin_m(world.options),
        "noise_sigma_m": 0.0 if world.options.clean else LIDAR_NOISE_M,
        "nodata": NODATA,
        "nodata_on": "water (land cover 4) and outside the coverage",
        "tiles": written,
    }
