"""Write the invented demo archive of the Valdmark Survey Office scenario.

The archive pairs a test release (release 2026-11: WGS 84 / UTM 32N, ellipsoidal heights, with
injected errors) with a reference (lidar 2021: ETRS89-LAEA Europe, EGM96 orthometric heights, finer
pixels on another tiling), plus land cover, provinces, checkpoints, a truth file and a job spec.
The world itself is in :mod:`demaudit.workers.demo.world`; this module is the I/O edge: the geoid
grid,
the reference tiling and the GeoTIFF, GeoJSON, CSV, JSON, YAML and Markdown files. Each tile is
made and written by one task, so memory does not grow with the size of the archive; big archives
run their tasks in worker processes (spawned, so a parent with threads is safe). Map projections
and the geoid are evaluated on a lattice every LATTICE_STEP_PX pixels and interpolated bilinearly
(PROJ per pixel cost more than the terrain itself): the interpolated EPSG:32632 positions of the
lidar pixels are within 1e-6 m of PROJ's, the geoid within 1e-5 m (measured on 1000 px tiles).
"""

from __future__ import annotations

import csv
import json
import math
import multiprocessing
import os
import shutil
from collections.abc import Callable, Iterator
from concurrent.futures import Future, ProcessPoolExecutor, as_completed
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field, replace
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np
import pyproj
import rasterio
import shapely
from rasterio.transform import Affine

from demaudit.workers.demo.options import (
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
    LandCover,
    RandomStream,
    TileGrid,
    tile_layout,
    tilted_tiles,
)
from demaudit.workers.demo.release import VoidDisc, reference_heights, release_tile, void_discs
from demaudit.workers.demo.surface import land_cover, true_terrain
from demaudit.workers.demo.world import DemoWorld, build_world, province_geometries
from demaudit.workers.tile.datum import DEFAULT_GRID_DIRS, geoid_undulation

__all__ = [
    "Checkpoints",
    "ArchiveSize",
    "DemoArchiveOptions",
    "Egm96Geoid",
    "ReferenceGrid",
    "checkpoint_count",
    "checkpoints",
    "archive_size",
    "clean_options",
    "make_demo_archive",
    "reference_layout",
    "size_problem",
    "tile_layout",
]

RELEASE_DIR = "release_2026_11"
UPDATE_DIR = "release_2026_11_update"
REFERENCE_DIR = "lidar_2021"
LANDCOVER_DIR = "landcover"
_GEOID_PROBE = (482_400.0, 6_227_600.0)  # a point of the demo domain, EPSG:32632
#: Pixels between the lattice nodes where PROJ evaluates positions and the geoid.
LATTICE_STEP_PX = 8
#: Below this many test pixels an archive is made in this process (starting workers costs more).
PARALLEL_FROM_PIXELS = 4_000_000


class Egm96Geoid:
    """EGM96 geoid undulation N (metres) at EPSG:32632 points: ellipsoidal = orthometric + N.

    A thin adapter over :func:`demaudit.workers.tile.datum.geoid_undulation`, which refuses to run
    without the
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


#: Peak bytes per pixel of one tile task (float64 fields, the random draws, the float32 copy);
#: measured with tracemalloc on 1000 px tiles: 160-180 for a test tile, 150 for a lidar tile.
TASK_BYTES_PER_PIXEL = 200


@dataclass(frozen=True)
class ArchiveSize:
    """What an archive needs: uncompressed bytes of its tiles (an upper bound of the files,
    which are DEFLATE-compressed) and the peak memory of one tile task, both in bytes."""

    disk_bytes: int
    task_memory_bytes: int


def archive_size(options: DemoArchiveOptions) -> ArchiveSize:
    """Estimate the archive's size from the options alone (nothing is allocated): test tiles
    x pixels^2 x (4 bytes of heights + 1 of land cover), the update tiles and the lidar tiles
    at 4 bytes a pixel."""
    test_pixels = options.tiles_x * options.tiles_y * options.pixels**2
    update_pixels = len(tilted_tiles(options)) * options.pixels**2 if options.write_update else 0
    layout = reference_layout(options)
    lidar_pixels = len(layout.cols) * len(layout.rows) * layout.tile_pixels**2
    largest_tile = max(options.pixels, layout.tile_pixels) ** 2
    return ArchiveSize(
        disk_bytes=5 * test_pixels + 4 * update_pixels + 4 * lidar_pixels,
        task_memory_bytes=TASK_BYTES_PER_PIXEL * largest_tile,
    )


def size_problem(options: DemoArchiveOptions, out_dir: Path) -> str | None:
    """Why the archive cannot be made here (too big for the free disk space below out_dir or
    for the available memory), or None. Nothing is allocated or written."""
    size = archive_size(options)
    free_disk = shutil.disk_usage(_existing_parent(Path(out_dir))).free
    if size.disk_bytes > free_disk:
        return (
            f"the archive needs up to {_gib(size.disk_bytes)} (uncompressed tiles) but only "
            f"{_gib(free_disk)} are free on the disk of {out_dir}"
        )
    memory = _available_memory()
    if size.task_memory_bytes > memory:
        return (
            f"one tile of {options.pixels} x {options.pixels} pixels needs about "
            f"{_gib(size.task_memory_bytes)} of memory but only {_gib(memory)} are available"
        )
    return None


def _existing_parent(path: Path) -> Path:
    path = path.absolute()
    while not path.exists() and path != path.parent:
        path = path.parent
    return path


def _available_memory() -> int:
    import psutil  # a dependency of dask.distributed

    return int(psutil.virtual_memory().available)


def _gib(count: int) -> str:
    return f"{count / 2**30:,.1f} GiB"


ProgressCallback = Callable[[int, int], None]


def make_demo_archive(
    out_dir: Path,
    options: DemoArchiveOptions = _DEFAULT_OPTIONS,
    *,
    workers: int | None = None,
    progress: ProgressCallback | None = None,
) -> Path:
    """Write the archive; return the path of the demo job spec (demo.yaml) inside out_dir.

    GeoTIFFs left in the archive's tile folders by an earlier run are removed first. ``workers``
    is the number of processes making the tiles (None: this process alone below
    PARALLEL_FROM_PIXELS test pixels, else one per CPU, at most 8); the files do not depend on
    it. ``progress(done, total)`` is called after each tile task (a test tile with its land
    cover and update tile, or a lidar tile). Raises demaudit.workers.errors.GeoidGridError if the
    EGM96
    grid cannot be found.
    """
    out_dir = Path(out_dir)
    Egm96Geoid()  # no grid: fail before anything is written
    world = build_world(options)
    layout = reference_layout(options)
    for folder in (RELEASE_DIR, UPDATE_DIR, REFERENCE_DIR, LANDCOVER_DIR):
        for stale in (out_dir / folder).glob("*.tif"):
            stale.unlink()
        if folder != UPDATE_DIR or options.write_update:
            (out_dir / folder).mkdir(parents=True, exist_ok=True)
    tasks = [_TileTask(RELEASE_DIR, col, row) for col, row in world.grid.tiles()]
    tasks += [_TileTask(REFERENCE_DIR, col, row) for col, row in layout.tiles()]
    done = _run_tasks(
        out_dir, world, layout, tasks, workers=_worker_count(options, workers), progress=progress
    )
    release = _ReleaseSummary()
    written = 0
    for task, outcome in zip(tasks, done, strict=True):
        if task.kind == REFERENCE_DIR:
            written += int(outcome["written"])
            continue
        release.blunders += outcome["blunders"]
        release.voids.extend(outcome["voids"])
        if outcome["update"]:
            release.update_tiles.append(outcome["update"])
    reference = _reference_summary(world, layout, written=written)
    _write_provinces(out_dir / "provinces.geojson", world)
    points = _write_checkpoints(out_dir / "checkpoints.csv", world)
    _write_truth(out_dir / "truth.json", world, release, reference, points)
    _write_readme(out_dir / "README.md", options)
    spec = out_dir / "demo.yaml"
    spec.write_text(_SPEC)
    return spec


@dataclass(frozen=True)
class _TileTask:
    """One tile to make: kind is RELEASE_DIR (test tile, land cover, update) or REFERENCE_DIR."""

    kind: str
    col: int
    row: int


def _worker_count(options: DemoArchiveOptions, workers: int | None) -> int:
    if workers is not None:
        return max(1, workers)
    if options.tiles_x * options.tiles_y * options.pixels**2 < PARALLEL_FROM_PIXELS:
        return 1
    fit = _available_memory() // max(1, archive_size(options).task_memory_bytes)
    return max(1, min(8, len(os.sched_getaffinity(0)), fit))


def _run_tasks(
    out_dir: Path,
    world: DemoWorld,
    layout: ReferenceGrid,
    tasks: list[_TileTask],
    *,
    workers: int,
    progress: ProgressCallback | None,
) -> list[dict[str, Any]]:
    """Every task's outcome, in the order of the tasks; in this process or in ``workers``."""
    report = progress or (lambda done, total: None)
    total = len(tasks)
    report(0, total)
    if workers == 1 or total == 1:
        outcomes = []
        for number, task in enumerate(tasks, start=1):
            outcomes.append(_make_tile(out_dir, world, layout, task))
            report(number, total)
        return outcomes
    spawn = multiprocessing.get_context("spawn")  # safe when the caller runs threads
    with (
        _one_thread_per_worker(),
        ProcessPoolExecutor(max_workers=min(workers, total), mp_context=spawn) as pool,
    ):
        futures: list[Future[dict[str, Any]]] = [
            pool.submit(_make_tile, out_dir, world, layout, task) for task in tasks
        ]
        for number, future in enumerate(as_completed(futures), start=1):
            future.result()  # a failed tile stops the archive here
            report(number, total)
        return [future.result() for future in futures]


_THREAD_VARIABLES = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


@contextmanager
def _one_thread_per_worker() -> Iterator[None]:
    """Workers started inside get one BLAS thread each (they run one per core already; the
    small products of Waves are faster on one thread). Variables already set are kept."""
    added = [name for name in _THREAD_VARIABLES if name not in os.environ]
    for name in added:
        os.environ[name] = "1"
    try:
        yield
    finally:
        for name in added:
            os.environ.pop(name, None)


def _make_tile(
    out_dir: Path, world: DemoWorld, layout: ReferenceGrid, task: _TileTask
) -> dict[str, Any]:
    """Make and write one tile task (runs in a worker process for big archives)."""
    if task.kind == RELEASE_DIR:
        return _write_release_tile(out_dir, world, task.col, task.row)
    return {"written": _write_reference_tile(out_dir, world, layout, task.col, task.row)}


@lru_cache(maxsize=1)
def _geoid() -> Egm96Geoid:
    """One geoid adapter per process."""
    return Egm96Geoid()


@lru_cache(maxsize=4)
def _transformer(source: str, target: str) -> pyproj.Transformer:
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


def _on_lattice(
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
class _ReleaseSummary:
    """What the release writer injected, for the truth file."""

    blunders: int = 0
    voids: list[dict[str, Any]] = field(default_factory=list)
    update_tiles: list[str] = field(default_factory=list)


def _write_release_tile(out_dir: Path, world: DemoWorld, col: int, row: int) -> dict[str, Any]:
    """One test tile (ellipsoidal float32), its land cover and, if tilted, its corrected update.

    Returns what the truth file needs: blunders, void records and the update tile's id or None.
    """
    grid, options = world.grid, world.options
    tile = release_tile(world, col, row)
    tile_id = grid.tile_id(col, row)
    west, north = grid.tile_origin(col, row)
    transform = _north_up(west, north, grid.pixel_size_m)
    geoid = _geoid()
    (undulation,) = _on_lattice(
        lambda e, n: (geoid.undulation(e, n),),
        west=west,
        north=north,
        pixel_size=grid.pixel_size_m,
        pixels=grid.pixels,
    )
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
    update = None
    if options.write_update and (col, row) in tilted_tiles(options):
        corrected = _to_float32(tile.heights + undulation)
        _write_raster(
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


def _write_reference_tile(
    out_dir: Path, world: DemoWorld, layout: ReferenceGrid, col: int, row: int
) -> bool:
    """One lidar tile on EPSG:3035 (orthometric float32); False (nothing written) if it has
    no coverage."""
    west, north = layout.tile_origin(col, row)
    to_test = _transformer(REFERENCE_CRS, TEST_CRS)
    easting, northing = _on_lattice(
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
    _write_raster(
        out_dir / REFERENCE_DIR / f"{layout.tile_id(col, row)}.tif",
        _to_float32(heights),
        crs=REFERENCE_CRS,
        transform=layout.transform(col, row),
        nodata=NODATA,
        tags=_REFERENCE_TAGS,
    )
    return True


def _reference_summary(world: DemoWorld, layout: ReferenceGrid, *, written: int) -> dict[str, Any]:
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
