"""Write the invented demo archive of the Valdmark Survey Office scenario.

The archive pairs a test release (release 2026-11: WGS 84 / UTM 32N, ellipsoidal heights, with
injected errors) with a reference (lidar 2021: ETRS89-LAEA Europe, EGM96 orthometric heights, finer
pixels on another tiling), plus land cover, provinces, checkpoints, a truth file and a job spec.
The world itself is in :mod:`workers.demo_terrain`; this module is the I/O edge: the geoid grid,
the reference tiling and the GeoTIFF, GeoJSON, CSV, JSON, YAML and Markdown files. Tiles are made
and written one at a time, so memory does not grow with the size of the archive.
"""

from __future__ import annotations

import csv
import json
import math
from collections.abc import Iterator
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pyproj
import rasterio
import shapely
from rasterio.transform import Affine

from workers.datum import DEFAULT_GRID_DIRS, geoid_undulation
from workers.demo_terrain import (
    BLUNDER_RANGE_M,
    CANOPY_RANGE_M,
    LIDAR_NOISE_M,
    NODATA,
    PROVINCES,
    REFERENCE_CRS,
    ROOF_RANGE_M,
    SURVEY_RMSE_M,
    TEST_CRS,
    DemoArchiveOptions,
    DemoWorld,
    LandCover,
    RandomStream,
    TileGrid,
    VoidDisc,
    build_world,
    land_cover,
    province_geometries,
    reference_heights,
    release_tile,
    tile_layout,
    tilted_tiles,
    true_terrain,
    void_discs,
)

__all__ = [
    "Checkpoints",
    "DemoArchiveOptions",
    "Egm96Geoid",
    "ReferenceGrid",
    "checkpoint_count",
    "checkpoints",
    "clean_options",
    "make_demo_archive",
    "reference_layout",
    "tile_layout",
]

RELEASE_DIR = "release_2026_11"
UPDATE_DIR = "release_2026_11_update"
REFERENCE_DIR = "lidar_2021"
LANDCOVER_DIR = "landcover"
_GEOID_PROBE = (482_400.0, 6_227_600.0)  # a point of the demo domain, EPSG:32632


class Egm96Geoid:
    """EGM96 geoid undulation N (metres) at EPSG:32632 points: ellipsoidal = orthometric + N.

    A thin adapter over :func:`workers.datum.geoid_undulation`, which refuses to run without the
    grid (GeoidGridError), so the demo never silently skips the geoid.
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
        return _north_up(west, north, self.pixel_size_m)

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


def _north_up(west: float, north: float, pixel_size: float) -> Affine:
    """Geotransform of a north-up raster with square pixels."""
    return Affine(pixel_size, 0.0, west, 0.0, -pixel_size, north)


def clean_options(**overrides: Any) -> DemoArchiveOptions:
    """Options with no shift, no noise, no canopy/roofs, no blunders, no voids, no tilt.

    The vertical bias is kept unless overridden; any field may be overridden by keyword.
    """
    clean = DemoArchiveOptions(
        shift_east_m=0.0,
        shift_north_m=0.0,
        canopy=False,
        noise_sigma_m=0.0,
        blunder_fraction=0.0,
        void_patches=0,
        tilt_m_per_km=0.0,
    )
    return replace(clean, **overrides)


_DEFAULT_OPTIONS = DemoArchiveOptions()


def make_demo_archive(out_dir: Path, options: DemoArchiveOptions = _DEFAULT_OPTIONS) -> Path:
    """Write the archive; return the path of the demo job spec (demo.yaml) inside out_dir.

    GeoTIFFs left in the archive's tile folders by an earlier run are removed first.
    Raises workers.errors.GeoidGridError if the EGM96 grid cannot be found.
    """
    out_dir = Path(out_dir)
    geoid = Egm96Geoid()
    world = build_world(options)
    for folder in (RELEASE_DIR, UPDATE_DIR, REFERENCE_DIR, LANDCOVER_DIR):
        for stale in (out_dir / folder).glob("*.tif"):
            stale.unlink()
        if folder != UPDATE_DIR or options.write_update:
            (out_dir / folder).mkdir(parents=True, exist_ok=True)
    release = _write_release(out_dir, world, geoid)
    reference = _write_reference(out_dir, world)
    _write_provinces(out_dir / "provinces.geojson", world)
    points = _write_checkpoints(out_dir / "checkpoints.csv", world)
    _write_truth(out_dir / "truth.json", world, release, reference, points)
    _write_readme(out_dir / "README.md", options)
    spec = out_dir / "demo.yaml"
    spec.write_text(_SPEC)
    return spec


def _write_raster(
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
class _ReleaseSummary:
    """What the release writer injected, for the truth file."""

    blunders: int = 0
    voids: list[dict[str, Any]] = field(default_factory=list)
    update_tiles: list[str] = field(default_factory=list)


def _write_release(out_dir: Path, world: DemoWorld, geoid: Egm96Geoid) -> _ReleaseSummary:
    """Test tiles (ellipsoidal float32), their land cover and the corrected update tiles."""
    grid, options = world.grid, world.options
    summary = _ReleaseSummary()
    tilted = tilted_tiles(options)
    for col, row in grid.tiles():
        tile = release_tile(world, col, row)
        tile_id = grid.tile_id(col, row)
        transform = _north_up(*grid.tile_origin(col, row), grid.pixel_size_m)
        undulation = geoid.undulation(*grid.pixel_centres(col, row))
        delivered = _to_float32(tile.heights + tile.ramp + undulation)
        _write_raster(
            out_dir / RELEASE_DIR / f"{tile_id}.tif",
            delivered,
            crs=TEST_CRS,
            transform=transform,
            nodata=NODATA,
            tags=_RELEASE_TAGS,
        )
        _write_raster(
            out_dir / LANDCOVER_DIR / f"{tile_id}.tif",
            tile.land_cover,
            crs=TEST_CRS,
            transform=transform,
            nodata=0,
            tags=_LANDCOVER_TAGS,
        )
        if options.write_update and (col, row) in tilted:
            corrected = _to_float32(tile.heights + undulation)
            _write_raster(
                out_dir / UPDATE_DIR / f"{tile_id}.tif",
                corrected,
                crs=TEST_CRS,
                transform=transform,
                nodata=NODATA,
                tags=_RELEASE_TAGS,
            )
            summary.update_tiles.append(tile_id)
        summary.blunders += tile.blunders
        summary.voids.extend(_void_record(grid, tile_id, col, row, disc) for disc in tile.voids)
    return summary


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


def _write_reference(out_dir: Path, world: DemoWorld) -> dict[str, Any]:
    """Lidar tiles on EPSG:3035 (orthometric float32); tiles with no coverage are not written."""
    layout = reference_layout(world.options)
    margin = reference_margin_m(world.options)
    to_test = pyproj.Transformer.from_crs(REFERENCE_CRS, TEST_CRS, always_xy=True)
    written = 0
    for col, row in layout.tiles():
        easting, northing = to_test.transform(*layout.pixel_centres(col, row))
        heights = reference_heights(world, easting, northing, tile_key=(col, row), margin_m=margin)
        if np.isnan(heights).all():
            continue
        _write_raster(
            out_dir / REFERENCE_DIR / f"{layout.tile_id(col, row)}.tif",
            _to_float32(heights),
            crs=REFERENCE_CRS,
            transform=layout.transform(col, row),
            nodata=NODATA,
            tags=_REFERENCE_TAGS,
        )
        written += 1
    return {
        "crs": REFERENCE_CRS,
        "vertical_crs": "EPSG:5773",
        "pixel_size_m": layout.pixel_size_m,
        "tile_pixels": layout.tile_pixels,
        "tiling_origin_offset_m": layout.offset_m,
        "coverage_margin_m": margin,
        "noise_sigma_m": 0.0 if world.options.clean else LIDAR_NOISE_M,
        "nodata": NODATA,
        "nodata_on": "water (land cover 4) and outside the coverage",
        "tiles": written,
    }


def _write_provinces(path: Path, world: DemoWorld) -> None:
    """Provinces as a GeoJSON FeatureCollection in EPSG:4326 (lon, lat; RFC 7946 winding)."""
    to_lonlat = pyproj.Transformer.from_crs(TEST_CRS, "EPSG:4326", always_xy=True)

    def lonlat(xy: np.ndarray) -> np.ndarray:
        lon, lat = to_lonlat.transform(xy[:, 0], xy[:, 1])
        return np.round(np.column_stack([lon, lat]), 7)

    features = []
    for code, geometry in province_geometries(world).items():
        shape = shapely.orient_polygons(shapely.transform(geometry, lonlat))
        features.append(
            {
                "type": "Feature",
                "properties": {"code": code, "name": PROVINCES[code]},
                "geometry": shapely.geometry.mapping(shape),
            }
        )
    collection = {"type": "FeatureCollection", "features": features}
    path.write_text(json.dumps(collection, separators=(",", ":")) + "\n")


@dataclass(frozen=True, eq=False)
class Checkpoints:
    """Surveyed points: EPSG:32632 metres, EGM96 orthometric heights in metres, land-cover class."""

    ids: tuple[str, ...]
    easting: np.ndarray
    northing: np.ndarray
    height: np.ndarray
    land_cover: np.ndarray
    survey_rmse_m: float


def survey_rmse(options: DemoArchiveOptions) -> float:
    """Survey error (metres, 1 sigma) of the checkpoints: SURVEY_RMSE_M, none for clean options."""
    return 0.0 if options.clean else SURVEY_RMSE_M


def checkpoint_count(options: DemoArchiveOptions) -> int:
    """200 points for the default 6 x 6 x 160 x 5 m archive, scaled by area, at least 20."""
    area = options.tiles_x * options.tiles_y * (options.pixels * options.pixel_size_m) ** 2
    return max(20, round(200 * area / (36 * 800.0**2)))


_KEEP_CHANCE = np.array([0.0, 1.0, 0.3, 0.5, 0.0])  # by class: mostly open ground, never water


def checkpoints(world: DemoWorld) -> Checkpoints:
    """Checkpoints on land (classes 1-3), inside the domain, clear of the test tiles' voids.

    Positions are rounded to the millimetre before the terrain is evaluated; heights are the true
    terrain plus a normal survey error (sigma SURVEY_RMSE_M, none for clean options).
    """
    options, grid = world.options, world.grid
    rng = np.random.default_rng([options.seed, RandomStream.CHECKPOINTS])
    wanted = checkpoint_count(options)
    margin = 2 * grid.pixel_size_m
    voids: dict[tuple[int, int], tuple[VoidDisc, ...]] = {}
    kept_e: list[float] = []
    kept_n: list[float] = []
    for _ in range(1000):
        easting = np.round(grid.west + rng.uniform(margin, grid.width_m - margin, wanted), 3)
        northing = np.round(grid.north - rng.uniform(margin, grid.height_m - margin, wanted), 3)
        chance = _KEEP_CHANCE[land_cover(world, easting, northing)]
        lucky = rng.random(wanted) < chance
        for e, n in zip(easting[lucky], northing[lucky], strict=True):
            if len(kept_e) < wanted and not _in_void(grid, options, voids, float(e), float(n)):
                kept_e.append(float(e))
                kept_n.append(float(n))
        if len(kept_e) == wanted:
            break
    if len(kept_e) < wanted:
        raise ValueError("no room for the checkpoints: the domain is water or void everywhere")
    easting, northing = np.array(kept_e), np.array(kept_n)
    sigma = survey_rmse(options)
    height = true_terrain(world, easting, northing) + sigma * rng.standard_normal(wanted)
    return Checkpoints(
        ids=tuple(f"cp{i + 1:04d}" for i in range(wanted)),
        easting=easting,
        northing=northing,
        height=height,
        land_cover=land_cover(world, easting, northing),
        survey_rmse_m=sigma,
    )


def _in_void(
    grid: TileGrid,
    options: DemoArchiveOptions,
    cache: dict[tuple[int, int], tuple[VoidDisc, ...]],
    easting: float,
    northing: float,
) -> bool:
    """True if a point lies within two pixels of a void of its test tile."""
    col, row = grid.tile_of(easting, northing)
    discs = cache.setdefault((col, row), void_discs(options, col, row))
    west, north = grid.tile_origin(col, row)
    x = (easting - west) / grid.pixel_size_m
    y = (north - northing) / grid.pixel_size_m
    return any(math.hypot(x - d.col, y - d.row) <= d.radius + 2 for d in discs)


def _write_checkpoints(path: Path, world: DemoWorld) -> Checkpoints:
    """Checkpoints CSV: EPSG:32632 metres, EGM96 orthometric heights (EPSG:5773) in metres."""
    points = checkpoints(world)
    with path.open("w", newline="") as stream:
        stream.write(
            "# Valdmark Survey Office GNSS checkpoints (invented demo data)\n"
            "# horizontal_crs: EPSG:32632 (WGS 84 / UTM zone 32N), easting and northing\n"
            "# vertical_datum: EGM96 orthometric height, EPSG:5773\n"
            "# units: metre\n"
            f"# survey_rmse_m: {points.survey_rmse_m}\n"
            "# landcover: 1 open ground, 2 forest, 3 built-up\n"
        )
        writer = csv.writer(stream, lineterminator="\n")
        writer.writerow(["id", "easting", "northing", "height", "landcover"])
        columns = (points.ids, points.easting, points.northing, points.height, points.land_cover)
        for name, easting, northing, height, cover in zip(*columns, strict=True):
            writer.writerow(
                [name, f"{easting:.3f}", f"{northing:.3f}", f"{height:.3f}", int(cover)]
            )
    return points


def _write_truth(
    path: Path,
    world: DemoWorld,
    release: _ReleaseSummary,
    reference: dict[str, Any],
    points: Checkpoints,
) -> None:
    """Every injected parameter, so that tests can check what the audit recovers."""
    options, grid = world.options, world.grid
    tilted = [grid.tile_id(col, row) for col, row in tilted_tiles(options)]
    truth = {
        "scenario": "Valdmark Survey Office, release 2026-11 vs lidar 2021 (invented)",
        "seed": options.seed,
        "tiles": {"x": options.tiles_x, "y": options.tiles_y},
        "pixels": options.pixels,
        "test": {
            "crs": TEST_CRS,
            "vertical_crs": "ellipsoidal (WGS 84, EPSG:4979)",
            "pixel_size_m": options.pixel_size_m,
            "tile_size_m": grid.tile_size_m,
            "domain_west_m": grid.west,
            "domain_north_m": grid.north,
            "domain_east_m": grid.west + grid.width_m,
            "domain_south_m": grid.north - grid.height_m,
            "nodata": NODATA,
        },
        "reference": reference,
        "geoid": {
            "model": "EGM96",
            "grid": "egm96_15.gtx",
            "vertical_crs": "EPSG:5773",
            "to": "EPSG:4979",
        },
        "shift": {"east_m": options.shift_east_m, "north_m": options.shift_north_m},
        "vertical_bias_m": options.vertical_bias_m,
        "canopy": {
            "enabled": options.canopy,
            "forest_m": list(CANOPY_RANGE_M),
            "roof_m": list(ROOF_RANGE_M),
        },
        "noise": {
            "sigma_m": options.noise_sigma_m,
            "slope_factor": options.noise_slope_factor,
            "model": "sigma = sigma_m + slope_factor * tan(slope); 0 when sigma_m is 0",
        },
        "blunders": {
            "fraction": options.blunder_fraction,
            "range_m": list(BLUNDER_RANGE_M),
            "count": release.blunders,
        },
        "voids": {
            "patches_per_10_tiles": options.void_patches,
            "count": len(release.voids),
            "discs": release.voids,
        },
        "tilt": {
            "m_per_km": options.tilt_m_per_km,
            "tiles": tilted,
            "rises_towards": "east",
            "zero_at_easting_m": grid.west,
        },
        "update": {"written": options.write_update, "tiles": release.update_tiles},
        "landcover": {
            "classes": {c.name.lower(): int(c) for c in LandCover},
            "nodata": 0,
            "frame": "what the test tiles show (moves with the shift)",
        },
        "checkpoints": {"count": len(points.ids), "survey_rmse_m": points.survey_rmse_m},
        "options": asdict(options),
    }
    path.write_text(json.dumps(truth, indent=2) + "\n")


def _write_readme(path: Path, options: DemoArchiveOptions) -> None:
    path.write_text(
        "# Demo archive (invented data)\n\n"
        "A made-up audit case of the Valdmark Survey Office: the photogrammetric surface model\n"
        "release 2026-11 (`release_2026_11/`, WGS 84 / UTM 32N, ellipsoidal heights) against the\n"
        "2021 lidar terrain model (`lidar_2021/`, ETRS89-LAEA, EGM96 heights), with land cover,\n"
        "provinces (`provinces.geojson`), GNSS checkpoints (`checkpoints.csv`), the corrected\n"
        "tiles of the nightly update (`release_2026_11_update/`) and the injected errors\n"
        "(`truth.json`). Nothing here describes a real place or agency.\n\n"
        "Audit it with the job spec `demo.yaml`. Made with:\n\n"
        f"    demaudit make-demo-archive --out DIR --tiles {options.tiles_x}x{options.tiles_y}"
        f" --pixels {options.pixels} --seed {options.seed}\n"
    )


_SPEC = """\
name: release-2026-11
test:
  tiles: release_2026_11/*.tif
  vertical_crs: ellipsoidal
  units: metre
reference:
  tiles: lidar_2021/*.tif
  vertical_crs: EPSG:5773
  units: metre
checkpoints:
  file: checkpoints.csv
  vertical_crs: EPSG:5773
  units: metre
region:
  file: provinces.geojson
  id_property: code
landcover:
  tiles: landcover/*.tif
  classes:
    1: {name: open ground, group: non_vegetated}
    2: {name: forest, group: vegetated}
    3: {name: built-up, group: non_vegetated}
    4: {name: water, group: excluded}
strata:
  slope_bands_deg: [0, 5, 15, 30, 45]
outliers:
  rule: nmad
  factor: 5
grading:
  standards: [nssda, asprs2014, asprs2023, quality_level]
  asprs_class_cm: 10
  quality_level: QL2
options:
  resampling: bilinear
"""
