"""Archives and plans of the throughput benchmark (bench_throughput.py): the same-grid archive
written here, the reprojected one by make_demo_archive, which files each size reads, and the
demaudit job spec of a size."""

from __future__ import annotations

import json
import math
import multiprocessing
import shutil
import time
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pyproj
import rasterio
import yaml
from rasterio.transform import Affine
from rasterio.warp import transform_bounds

from demaudit.workers.demo.archive import make_demo_archive
from demaudit.workers.demo.options import (
    LIDAR_NOISE_M,
    NODATA,
    TEST_CRS,
    DemoArchiveOptions,
    RandomStream,
)
from demaudit.workers.demo.release import release_tile
from demaudit.workers.demo.surface import true_terrain
from demaudit.workers.demo.world import build_world

WORKERS = 2
SAME_GRID, REPROJECTED = "same-grid", "reprojected"


def say(message: str = "") -> None:
    print(message, flush=True)


# -- archives -----------------------------------------------------------------------------------


@dataclass(frozen=True)
class Layout:
    """Tiles as a cols x rows block."""

    cols: int
    rows: int

    @property
    def count(self) -> int:
        return self.cols * self.rows


def layout_of(count: int) -> Layout:
    cols = math.ceil(math.sqrt(count))
    if count % cols:
        raise SystemExit(f"--tiles: {count} tiles do not make a block (use 1, 2, 4, 9, 16, 64...)")
    return Layout(cols, count // cols)


def demo_options(layout: Layout, pixels: int) -> DemoArchiveOptions:
    return DemoArchiveOptions(
        tiles_x=layout.cols, tiles_y=layout.rows, pixels=pixels, write_update=False
    )


def _write_float32(path: Path, heights: np.ndarray, transform: Affine) -> None:
    data = np.where(np.isnan(heights), NODATA, heights).astype(np.float32)
    profile = {
        "driver": "GTiff",
        "width": data.shape[1],
        "height": data.shape[0],
        "count": 1,
        "dtype": "float32",
        "crs": TEST_CRS,
        "transform": transform,
        "nodata": NODATA,
        "compress": "deflate",
        "predictor": 3,
        "tiled": True,
        "blockxsize": 256,
        "blockysize": 256,
    }
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data, 1)


def _same_grid_tile(folder: Path, options: DemoArchiveOptions, col: int, row: int) -> None:
    """One test tile and its reference on the same grid (worker process)."""
    world = build_world(options)
    grid = world.grid
    tile_id = grid.tile_id(col, row)
    west, north = grid.tile_origin(col, row)
    transform = Affine(grid.pixel_size_m, 0.0, west, 0.0, -grid.pixel_size_m, north)
    _write_float32(
        folder / "test" / f"{tile_id}.tif", release_tile(world, col, row).heights, transform
    )
    rng = np.random.default_rng([options.seed, RandomStream.REFERENCE, col, row])
    reference = true_terrain(world, *grid.pixel_axes(col, row))
    reference += LIDAR_NOISE_M * rng.standard_normal(reference.shape)
    _write_float32(folder / "reference" / f"{tile_id}.tif", reference, transform)


def make_same_grid(folder: Path, options: DemoArchiveOptions) -> None:
    for sub in ("test", "reference"):
        (folder / sub).mkdir(parents=True, exist_ok=True)
    tiles = [(c, r) for r in range(options.tiles_y) for c in range(options.tiles_x)]
    spawn = multiprocessing.get_context("spawn")
    with ProcessPoolExecutor(WORKERS, mp_context=spawn) as pool:
        for done, _ in enumerate(
            pool.map(
                _same_grid_tile, *zip(*[(folder, options, c, r) for c, r in tiles], strict=True)
            ),
            start=1,
        ):
            print(f"\r  same-grid tiles {done}/{len(tiles)}", end="", flush=True)
    say()


def ensure_archive(cache: Path, kind: str, layout: Layout, pixels: int) -> Path:
    """The archive folder, made (and timed) unless the cache holds it already."""
    options = demo_options(layout, pixels)
    folder = cache / f"{kind}-{layout.cols}x{layout.rows}-{pixels}"
    marker = folder / "bench_options.json"
    wanted = json.dumps({"kind": kind, **options.__dict__}, sort_keys=True)
    if marker.is_file() and marker.read_text() == wanted:
        say(f"[archive] {kind}: reusing {folder}")
        return folder
    shutil.rmtree(folder, ignore_errors=True)
    folder.mkdir(parents=True)
    started = time.perf_counter()
    if kind == SAME_GRID:
        make_same_grid(folder, options)
    else:
        make_demo_archive(
            folder,
            options,
            progress=lambda done, total: print(
                f"\r  demo archive tasks {done}/{total}", end="", flush=True
            ),
        )
        say()
    seconds = time.perf_counter() - started
    say(f"[archive] {kind}: {layout.count} tiles of {pixels} px made in {seconds:.1f} s")
    marker.write_text(wanted)
    return folder


# -- plans: which files each size reads ---------------------------------------------------------


@dataclass
class Plan:
    """What one size of one archive reads: test tiles, each with its overlapping references."""

    kind: str
    size: int
    pairs: list[tuple[str, list[str]]]
    reference_vertical_crs: str

    @property
    def references(self) -> list[str]:
        return sorted({r for _, refs in self.pairs for r in refs})

    @property
    def test_pixels(self) -> int:
        total = 0
        for test, _ in self.pairs:
            with rasterio.open(test) as src:
                total += src.width * src.height
        return total


def _bounds(path: Path) -> tuple[str, tuple[float, float, float, float]]:
    with rasterio.open(path) as src:
        return src.crs.to_wkt(), tuple(src.bounds)


def make_plan(folder: Path, kind: str, layout: Layout, subset: Layout) -> Plan:
    options = demo_options(layout, 8)
    grid = build_world(options).grid
    tests = [grid.tile_id(c, r) for r in range(subset.rows) for c in range(subset.cols)]
    if kind == SAME_GRID:
        pairs = [
            (str(folder / "test" / f"{t}.tif"), [str(folder / "reference" / f"{t}.tif")])
            for t in tests
        ]
        return Plan(kind, subset.count, pairs, "ellipsoidal")
    references = {p: _bounds(p) for p in sorted((folder / "lidar_2021").glob("*.tif"))}
    pairs = []
    for t in tests:
        path = folder / "release_2026_11" / f"{t}.tif"
        crs, box = _bounds(path)
        overlapping = []
        for ref, (ref_crs, ref_box) in references.items():
            left, bottom, right, top = transform_bounds(crs, ref_crs, *box, densify_pts=21)
            if (
                left < ref_box[2]
                and right > ref_box[0]
                and bottom < ref_box[3]
                and top > ref_box[1]
            ):
                overlapping.append(str(ref))
        pairs.append((str(path), overlapping))
    return Plan(kind, subset.count, pairs, "EPSG:5773")


def write_spec(plan: Plan, folder: Path) -> Path:
    """A demaudit job spec for the plan: one region (the domain), default options."""
    folder.mkdir(parents=True, exist_ok=True)
    boxes = [_bounds(Path(t))[1] for t, _ in plan.pairs]
    west, south = min(b[0] for b in boxes), min(b[1] for b in boxes)
    east, north = max(b[2] for b in boxes), max(b[3] for b in boxes)
    to_lonlat = pyproj.Transformer.from_crs(TEST_CRS, "EPSG:4326", always_xy=True)
    lon0, lat0, lon1, lat1 = to_lonlat.transform_bounds(
        west - 100, south - 100, east + 100, north + 100, densify_pts=21
    )
    region = {
        "type": "FeatureCollection",
        "features": [
            {
                "type": "Feature",
                "properties": {"code": "ALL"},
                "geometry": {
                    "type": "Polygon",
                    "coordinates": [
                        [[lon0, lat0], [lon1, lat0], [lon1, lat1], [lon0, lat1], [lon0, lat0]]
                    ],
                },
            }
        ],
    }
    (folder / "region.geojson").write_text(json.dumps(region))
    spec = {
        "name": f"throughput-{plan.kind}-{plan.size}",
        "test": {
            "tiles": [t for t, _ in plan.pairs],
            "vertical_crs": "ellipsoidal",
            "units": "metre",
        },
        "reference": {
            "tiles": plan.references,
            "vertical_crs": plan.reference_vertical_crs,
            "units": "metre",
        },
        "region": {"file": "region.geojson", "id_property": "code"},
    }
    path = folder / "spec.yaml"
    path.write_text(yaml.safe_dump(spec))
    return path
