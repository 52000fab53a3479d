"""The demo archive as written (workers/demo/archive.py, grids.py, tile_files.py): its files,
their georeferencing and values, and the speed-ups that must not change them."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyproj
import pytest
import rasterio
import shapely

from demaudit.workers.demo import archive as demo_archive
from demaudit.workers.demo.archive import (
    TASK_BYTES_PER_PIXEL,
    archive_size,
    clean_options,
    make_demo_archive,
    size_problem,
)
from demaudit.workers.demo.grids import Egm96Geoid, reference_layout
from demaudit.workers.demo.options import (
    NODATA,
    DemoArchiveOptions,
    LandCover,
    tile_layout,
    tilted_tiles,
)
from demaudit.workers.demo.release import (
    tilt_ramp,
)
from demaudit.workers.demo.surface import land_cover, true_terrain
from demaudit.workers.demo.world import build_world
from tests.support.demo_files import FLOAT32_TOLERANCE_M, FOLDERS, TINY, arrays, pixel_centres

# --- reproducibility -------------------------------------------------------------------------


def test_same_seed_gives_identical_tiles(archive: Path, tmp_path: Path) -> None:
    make_demo_archive(tmp_path, DemoArchiveOptions(**TINY, void_patches=20))
    for folder in FOLDERS:
        first, second = arrays(archive / folder), arrays(tmp_path / folder)
        assert first.keys() == second.keys() and first
        for name in first:
            assert first[name].tobytes() == second[name].tobytes(), f"{folder}/{name}"
    assert (archive / "checkpoints.csv").read_text() == (tmp_path / "checkpoints.csv").read_text()


def test_other_seed_gives_other_tiles(archive: Path, tmp_path: Path) -> None:
    make_demo_archive(tmp_path, DemoArchiveOptions(**TINY, void_patches=20, seed=2))
    for folder in ("release_2026_11", "lidar_2021", "landcover"):
        first, second = arrays(archive / folder), arrays(tmp_path / folder)
        assert any(not np.array_equal(first[name], second[name]) for name in first)


# --- files, layout and georeferencing --------------------------------------------------------


def test_archive_layout(archive: Path) -> None:
    names = {path.name for path in archive.iterdir()}
    assert names >= {*FOLDERS, "provinces.geojson", "checkpoints.csv", "truth.json"}
    assert names >= {"demo.yaml", "README.md"}
    ids = sorted(path.stem for path in (archive / "release_2026_11").glob("*.tif"))
    assert ids == ["r26_E00_N00", "r26_E00_N01", "r26_E01_N00", "r26_E01_N01"]
    landcover_ids = sorted(path.stem for path in (archive / "landcover").glob("*.tif"))
    assert landcover_ids == ids
    readme = (archive / "README.md").read_text()
    assert "Valdmark Survey Office" in readme and "invented" in readme
    assert "demaudit make-demo-archive --out DIR --tiles 2x2 --pixels 40 --seed 1" in readme


@pytest.mark.parametrize(
    ("folder", "epsg", "dtype", "nodata", "pixel"),
    [
        ("release_2026_11", 32632, "float32", NODATA, 5.0),
        ("release_2026_11_update", 32632, "float32", NODATA, 5.0),
        ("landcover", 32632, "uint8", 0, 5.0),
        ("lidar_2021", 3035, "float32", NODATA, 4.0),
    ],
)
def test_tile_format(
    archive: Path, folder: str, epsg: int, dtype: str, nodata: float, pixel: float
) -> None:
    for path in (archive / folder).glob("*.tif"):
        with rasterio.open(path) as src:
            assert src.crs.to_epsg() == epsg
            assert src.dtypes == (dtype,)
            assert src.nodata == nodata
            assert src.res == pytest.approx((pixel, pixel))
            structure = src.tags(ns="IMAGE_STRUCTURE")
            assert structure["COMPRESSION"] == "DEFLATE"
            if dtype == "float32":
                assert structure["PREDICTOR"] == "3"


def test_test_tiles_sit_on_one_grid(archive: Path) -> None:
    with rasterio.open(archive / "release_2026_11" / "r26_E01_N01.tif") as src:
        assert src.transform.c == 480_000 + 200 and src.transform.f == 6_230_000 - 200
        assert (src.width, src.height) == (40, 40)


def test_big_tiles_are_tiled_in_256_blocks(tmp_path: Path) -> None:
    options = clean_options(tiles_x=1, tiles_y=1, pixels=300, write_update=False)
    make_demo_archive(tmp_path, options)
    with rasterio.open(tmp_path / "release_2026_11" / "r26_E00_N00.tif") as src:
        assert src.block_shapes == [(256, 256)]
    assert not list((tmp_path / "release_2026_11_update").glob("*.tif"))


def test_reference_tiling_differs_and_covers_the_domain(archive: Path) -> None:
    layout = reference_layout(DemoArchiveOptions(**TINY))
    assert layout.tile_pixels == 35  # 0.7 x 200 m / 4 m
    assert layout.offset_m % layout.tile_size_m != 0
    covered = []
    for path in (archive / "lidar_2021").glob("*.tif"):
        with rasterio.open(path) as src:
            assert src.width == src.height == 35
            assert src.bounds.left % layout.tile_size_m == pytest.approx(layout.offset_m)
            covered.append(shapely.box(*src.bounds))
    to_reference = pyproj.Transformer.from_crs(32632, 3035, always_xy=True)
    margin = 3 * 4.0
    domain = shapely.segmentize(
        shapely.box(480_000 - margin, 6_229_600 - margin, 480_400 + margin, 6_230_000 + margin), 10
    )
    domain_3035 = shapely.transform(
        domain, lambda xy: np.column_stack(to_reference.transform(*xy.T))
    )
    assert shapely.union_all(covered).contains(domain_3035)


def test_landcover_classes(archive: Path) -> None:
    values = np.concatenate([a.ravel() for a in arrays(archive / "landcover").values()])
    assert set(np.unique(values)) <= {1, 2, 3, 4}


def test_voids_are_nodata(archive: Path) -> None:
    truth = json.loads((archive / "truth.json").read_text())
    assert truth["voids"]["count"] == len(truth["voids"]["discs"]) > 0
    release = arrays(archive / "release_2026_11")
    for disc in truth["voids"]["discs"]:
        tile = release[disc["tile"] + ".tif"]
        with rasterio.open(archive / "release_2026_11" / (disc["tile"] + ".tif")) as src:
            row, col = src.index(disc["easting"], disc["northing"])
        if 0 <= row < 40 and 0 <= col < 40:
            assert tile[row, col] == NODATA


# --- values ----------------------------------------------------------------------------------


def test_clean_release_is_terrain_plus_geoid_plus_bias(clean_archive: Path, geoid: Egm96Geoid):
    world = build_world(clean_options(**TINY))
    for path in (clean_archive / "release_2026_11").glob("*.tif"):
        with rasterio.open(path) as src:
            heights = src.read(1).astype(float)
            easting, northing = pixel_centres(src)
        assert (heights != NODATA).all()
        expected = true_terrain(world, easting, northing) + geoid.undulation(easting, northing)
        np.testing.assert_allclose(heights - expected, 0.25, atol=FLOAT32_TOLERANCE_M)


def test_geoid_is_egm96_around_valdmark(geoid: Egm96Geoid) -> None:
    undulation = geoid.undulation(np.array([480_000.0, 484_800.0]), np.array([6.23e6, 6.2252e6]))
    assert np.all((undulation > 35) & (undulation < 45))


def test_clean_reference_is_terrain_without_water(clean_archive: Path) -> None:
    world = build_world(clean_options(**TINY))
    to_test = pyproj.Transformer.from_crs(3035, 32632, always_xy=True)
    valid = 0
    for path in (clean_archive / "lidar_2021").glob("*.tif"):
        with rasterio.open(path) as src:
            heights = src.read(1).astype(float)
            easting, northing = to_test.transform(*pixel_centres(src))
        present = heights != NODATA
        water = land_cover(world, easting, northing) == LandCover.WATER
        assert not (present & water).any()
        expected = true_terrain(world, easting, northing)
        np.testing.assert_allclose(heights[present], expected[present], atol=FLOAT32_TOLERANCE_M)
        valid += present.sum()
    assert valid > 0.8 * (400 / 4.0) ** 2


def test_update_differs_only_by_the_ramp(archive: Path) -> None:
    options = DemoArchiveOptions(**TINY)
    grid = tile_layout(options)
    update = arrays(archive / "release_2026_11_update")
    release = arrays(archive / "release_2026_11")
    assert sorted(update) == sorted(f"{grid.tile_id(*key)}.tif" for key in tilted_tiles(options))
    for name, corrected in update.items():
        with rasterio.open(archive / "release_2026_11_update" / name) as src:
            easting, _ = pixel_centres(src)
        delivered = release[name]
        assert np.array_equal(delivered == NODATA, corrected == NODATA)
        valid = corrected != NODATA
        ramp = tilt_ramp(easting, m_per_km=1.0, west=480_000.0)
        difference = delivered.astype(float) - corrected.astype(float)
        np.testing.assert_allclose(difference[valid], ramp[valid], atol=FLOAT32_TOLERANCE_M)


def test_clean_options() -> None:
    options = clean_options(seed=7)
    assert (options.shift_east_m, options.shift_north_m, options.tilt_m_per_km) == (0, 0, 0)
    assert not options.canopy and options.noise_sigma_m == 0 and options.blunder_fraction == 0
    assert options.void_patches == 0 and options.vertical_bias_m == 0.25 and options.seed == 7


def test_missing_geoid_grid_is_an_error() -> None:
    # PROJ's data folders are process-wide, so look for the grid in a fresh process that knows
    # no folder holding egm96_15.gtx.
    code = (
        "from demaudit.workers.demo.grids import Egm96Geoid\n"
        "Egm96Geoid(grid_dirs=('/nonexistent-grid-folder',))\n"
    )
    env = {k: v for k, v in os.environ.items() if k not in {"PROJ_DATA", "PROJ_LIB"}}
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    assert done.returncode != 0
    assert "GeoidGridError" in done.stderr and "EPSG:5773" in done.stderr


# --- speed-ups that must not change the archive ---------------------------------------------

SHIPPED_DEMO = Path(__file__).resolve().parents[3] / "demo_tiles"
FLOAT32_STEP_M = 3.1e-5  # one float32 step between 256 and 512 m (2**-15 m); IEEE 754 binary32


def test_worker_processes_write_the_same_archive(archive: Path, tmp_path: Path) -> None:
    calls: list[tuple[int, int]] = []
    make_demo_archive(
        tmp_path,
        DemoArchiveOptions(**TINY, void_patches=20),
        workers=2,
        progress=lambda done, total: calls.append((done, total)),
    )
    for folder in FOLDERS:
        first, second = arrays(archive / folder), arrays(tmp_path / folder)
        assert first.keys() == second.keys() and first
        for name in first:
            assert first[name].tobytes() == second[name].tobytes(), f"{folder}/{name}"
    for name in ("truth.json", "checkpoints.csv", "provinces.geojson"):
        assert (archive / name).read_text() == (tmp_path / name).read_text()
    total = calls[-1][1]
    assert calls[0] == (0, total) and calls[-1] == (total, total)
    assert [done for done, _ in calls] == list(range(total + 1))
    assert total == 4 + len(list(reference_layout(DemoArchiveOptions(**TINY)).tiles()))


def test_the_generator_still_makes_the_shipped_demo(tmp_path: Path) -> None:
    # demo_tiles/README.md: made with --tiles 6x6 --pixels 160 --seed 1. Projections and the
    # geoid are now interpolated from a lattice (within 1e-5 m), so a height may land on the
    # neighbouring float32 value; everything else is identical.
    make_demo_archive(tmp_path, DemoArchiveOptions())
    for name in ("truth.json", "checkpoints.csv", "provinces.geojson", "demo.yaml", "README.md"):
        assert (tmp_path / name).read_bytes() == (SHIPPED_DEMO / name).read_bytes(), name
    assert arrays(tmp_path / "landcover").keys() == arrays(SHIPPED_DEMO / "landcover").keys()
    for name, shipped in arrays(SHIPPED_DEMO / "landcover").items():
        assert np.array_equal(arrays(tmp_path / "landcover")[name], shipped), name
    for folder in ("release_2026_11", "release_2026_11_update", "lidar_2021"):
        made, shipped = arrays(tmp_path / folder), arrays(SHIPPED_DEMO / folder)
        assert made.keys() == shipped.keys()
        changed = 0
        for name in shipped:
            assert np.array_equal(made[name] == NODATA, shipped[name] == NODATA), name
            step = np.abs(made[name].astype(float) - shipped[name].astype(float))
            assert step.max() <= FLOAT32_STEP_M, name
            changed += np.count_nonzero(step)
        assert changed < 0.05 * sum(a.size for a in shipped.values())


def test_archive_size_bounds_the_files(archive: Path) -> None:
    size = archive_size(DemoArchiveOptions(**TINY, void_patches=20))
    written = sum(p.stat().st_size for p in archive.rglob("*.tif"))
    pixels = sum(
        a.size * a.itemsize for folder in FOLDERS for a in arrays(archive / folder).values()
    )
    assert pixels <= size.disk_bytes < 3 * pixels  # lidar tiles without coverage are not written
    assert written < size.disk_bytes
    assert size.task_memory_bytes == TASK_BYTES_PER_PIXEL * 40**2


def test_size_problem_names_disk_and_memory(tmp_path: Path, monkeypatch) -> None:
    assert size_problem(DemoArchiveOptions(**TINY), tmp_path / "new" / "folder") is None
    huge = DemoArchiveOptions(tiles_x=1000, tiles_y=1000, pixels=1000)
    assert "disk" in (size_problem(huge, tmp_path) or "")
    monkeypatch.setattr(demo_archive, "_available_memory", lambda: 10**6)
    assert "memory" in (
        size_problem(DemoArchiveOptions(tiles_x=2, tiles_y=2, pixels=200), tmp_path) or ""
    )
