"""Tests of the demo archive: its invented world (workers/demo: options, world, surface,
release) and its writer (archive, grids, tile_files, survey_points, documents)."""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
from dataclasses import asdict, replace
from pathlib import Path
from typing import Any

import numpy as np
import pyproj
import pytest
import rasterio
import shapely
import yaml
from hypothesis import given, settings
from hypothesis import strategies as st
from shapely.geometry import shape

from demaudit.workers.demo import archive as demo_archive
from demaudit.workers.demo.archive import (
    TASK_BYTES_PER_PIXEL,
    DemoArchiveOptions,
    archive_size,
    clean_options,
    make_demo_archive,
    size_problem,
)
from demaudit.workers.demo.grids import Egm96Geoid, reference_layout
from demaudit.workers.demo.options import NODATA, PROVINCES, LandCover, tile_layout, tilted_tiles
from demaudit.workers.demo.release import (
    VoidDisc,
    blunder_error,
    random_error,
    release_tile,
    tilt_ramp,
    void_mask,
)
from demaudit.workers.demo.surface import land_cover, terrain_slope, true_terrain
from demaudit.workers.demo.survey_points import checkpoint_count, checkpoints
from demaudit.workers.demo.world import DemoWorld, build_world, province_index, province_weights
from demaudit.workers.spec import parse_spec, resolve

TINY: dict[str, Any] = {"tiles_x": 2, "tiles_y": 2, "pixels": 40}
FOLDERS = ("release_2026_11", "release_2026_11_update", "lidar_2021", "landcover")
FLOAT32_TOLERANCE_M = 1e-4  # float32 spacing is 3e-5 m at 300 m


def _arrays(folder: Path) -> dict[str, np.ndarray]:
    """Band 1 of every GeoTIFF in a folder, by file name."""
    out = {}
    for path in sorted(folder.glob("*.tif")):
        with rasterio.open(path) as src:
            out[path.name] = src.read(1)
    return out


def _pixel_centres(src: rasterio.DatasetReader) -> tuple[np.ndarray, np.ndarray]:
    transform = src.transform  # north-up, no rotation
    cols, rows = np.meshgrid(np.arange(src.width) + 0.5, np.arange(src.height) + 0.5)
    return transform.c + cols * transform.a, transform.f + rows * transform.e


@pytest.fixture(scope="module")
def archive(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("demo") / "archive"
    make_demo_archive(out, DemoArchiveOptions(**TINY, void_patches=20))
    return out


@pytest.fixture(scope="module")
def clean_archive(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("clean") / "archive"
    make_demo_archive(out, clean_options(**TINY))
    return out


@pytest.fixture(scope="module")
def geoid() -> Egm96Geoid:
    return Egm96Geoid()


# --- reproducibility -------------------------------------------------------------------------


def test_same_seed_gives_identical_tiles(archive: Path, tmp_path: Path) -> None:
    make_demo_archive(tmp_path, DemoArchiveOptions(**TINY, void_patches=20))
    for folder in FOLDERS:
        first, second = _arrays(archive / folder), _arrays(tmp_path / folder)
        assert first.keys() == second.keys() and first
        for name in first:
            assert first[name].tobytes() == second[name].tobytes(), f"{folder}/{name}"
    assert (archive / "checkpoints.csv").read_text() == (tmp_path / "checkpoints.csv").read_text()


def test_other_seed_gives_other_tiles(archive: Path, tmp_path: Path) -> None:
    make_demo_archive(tmp_path, DemoArchiveOptions(**TINY, void_patches=20, seed=2))
    for folder in ("release_2026_11", "lidar_2021", "landcover"):
        first, second = _arrays(archive / folder), _arrays(tmp_path / folder)
        assert any(not np.array_equal(first[name], second[name]) for name in first)


def test_a_tile_does_not_depend_on_the_archive_size() -> None:
    options = clean_options(**TINY, noise_sigma_m=0.3, noise_slope_factor=0.0, void_patches=30)
    options = replace(options, blunder_fraction=0.01)
    small, large = build_world(options), build_world(replace(options, tiles_x=16, tiles_y=16))
    assert release_tile(large, 15, 15).heights.shape == (40, 40)

    def errors(world: DemoWorld) -> np.ndarray:
        tile = release_tile(world, 1, 1)
        return tile.heights - true_terrain(world, *world.grid.pixel_centres(1, 1)) - 0.25

    # the random errors come from (seed, col, row) streams, whatever the size of the archive
    np.testing.assert_allclose(errors(small), errors(large), atol=1e-9)
    assert np.nanstd(errors(small)) > 0.2


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


def test_job_spec(archive: Path) -> None:
    data = yaml.safe_load((archive / "demo.yaml").read_text())
    job = resolve(parse_spec(data), base_dir=archive)
    assert job.spec.name == "release-2026-11"
    assert (job.spec.test.vertical_crs, job.spec.reference.vertical_crs) == (
        "ellipsoidal",
        "EPSG:5773",
    )
    assert job.test_tiles and job.reference_tiles and job.landcover_tiles
    assert job.spec.landcover is not None
    groups = {v: c.group for v, c in job.spec.landcover.classes.items()}
    assert groups == {1: "non_vegetated", 2: "vegetated", 3: "non_vegetated", 4: "excluded"}
    assert make_demo_archive.__defaults__ == (DemoArchiveOptions(),)


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
    values = np.concatenate([a.ravel() for a in _arrays(archive / "landcover").values()])
    assert set(np.unique(values)) <= {1, 2, 3, 4}


def test_voids_are_nodata(archive: Path) -> None:
    truth = json.loads((archive / "truth.json").read_text())
    assert truth["voids"]["count"] == len(truth["voids"]["discs"]) > 0
    release = _arrays(archive / "release_2026_11")
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
            easting, northing = _pixel_centres(src)
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
            easting, northing = to_test.transform(*_pixel_centres(src))
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
    update = _arrays(archive / "release_2026_11_update")
    release = _arrays(archive / "release_2026_11")
    assert sorted(update) == sorted(f"{grid.tile_id(*key)}.tif" for key in tilted_tiles(options))
    for name, corrected in update.items():
        with rasterio.open(archive / "release_2026_11_update" / name) as src:
            easting, _ = _pixel_centres(src)
        delivered = release[name]
        assert np.array_equal(delivered == NODATA, corrected == NODATA)
        valid = corrected != NODATA
        ramp = tilt_ramp(easting, m_per_km=1.0, west=480_000.0)
        difference = delivered.astype(float) - corrected.astype(float)
        np.testing.assert_allclose(difference[valid], ramp[valid], atol=FLOAT32_TOLERANCE_M)


def test_shift_moves_the_features() -> None:
    options = clean_options(**TINY, shift_east_m=1.6, shift_north_m=-0.9)
    world = build_world(options)
    tile = release_tile(world, 0, 1)
    easting, northing = world.grid.pixel_centres(0, 1)
    expected = true_terrain(world, easting - 1.6, northing + 0.9) + options.vertical_bias_m
    np.testing.assert_allclose(tile.heights, expected, atol=1e-9)


def test_canopy_sits_on_forest_only() -> None:
    options = clean_options(canopy=True, tiles_x=6, tiles_y=6, pixels=40, pixel_size_m=20.0)
    world = build_world(options)
    tile = release_tile(world, 0, 0)  # in Skerra Uplands: mostly forest
    above = tile.heights - true_terrain(world, *world.grid.pixel_centres(0, 0)) - 0.25
    forest = tile.land_cover == LandCover.FOREST
    assert forest.mean() > 0.3
    assert np.all((above[forest] >= 6) & (above[forest] <= 20))
    assert np.allclose(above[tile.land_cover == LandCover.OPEN_GROUND], 0, atol=1e-9)


def test_truth_file(archive: Path) -> None:
    truth = json.loads((archive / "truth.json").read_text())
    assert truth["shift"] == {"east_m": 1.6, "north_m": -0.9}
    assert truth["vertical_bias_m"] == 0.25
    assert truth["canopy"]["forest_m"] == [6.0, 20.0] and truth["canopy"]["roof_m"] == [6.0, 15.0]
    assert truth["noise"]["sigma_m"] == 0.3 and truth["noise"]["slope_factor"] == 0.5
    assert truth["blunders"]["fraction"] == 0.01 and truth["blunders"]["range_m"] == [5.0, 50.0]
    assert truth["blunders"]["count"] > 0
    assert truth["voids"]["patches_per_10_tiles"] == 20
    assert truth["tilt"]["m_per_km"] == 1.0
    assert sorted(truth["tilt"]["tiles"]) == sorted(truth["update"]["tiles"])
    assert len(truth["tilt"]["tiles"]) == 4
    assert truth["reference"]["crs"] == "EPSG:3035" and truth["reference"]["noise_sigma_m"] == 0.03
    assert truth["reference"]["pixel_size_m"] == 4.0
    assert truth["test"]["crs"] == "EPSG:32632" and truth["test"]["pixel_size_m"] == 5.0
    assert truth["seed"] == 1 and truth["tiles"] == {"x": 2, "y": 2} and truth["pixels"] == 40
    assert truth["options"] == asdict(DemoArchiveOptions(**TINY, void_patches=20))


def test_clean_options() -> None:
    options = clean_options(seed=7)
    assert (options.shift_east_m, options.shift_north_m, options.tilt_m_per_km) == (0, 0, 0)
    assert not options.canopy and options.noise_sigma_m == 0 and options.blunder_fraction == 0
    assert options.void_patches == 0 and options.vertical_bias_m == 0.25 and options.seed == 7


@pytest.mark.parametrize(
    "bad", [{"tiles_x": 0}, {"pixels": 4}, {"pixel_size_m": 0.0}, {"blunder_fraction": 2.0}]
)
def test_options_are_checked(bad: dict[str, float]) -> None:
    with pytest.raises(ValueError):
        DemoArchiveOptions(**bad)  # type: ignore[arg-type]


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


# --- provinces and checkpoints ---------------------------------------------------------------


def test_provinces(archive: Path) -> None:
    collection = json.loads((archive / "provinces.geojson").read_text())
    features = {f["properties"]["code"]: f for f in collection["features"]}
    assert {code: f["properties"]["name"] for code, f in features.items()} == PROVINCES
    assert features["TC"]["geometry"]["type"] == "MultiPolygon"
    assert features["HF"]["geometry"]["type"] == "Polygon"
    assert len(features["HF"]["geometry"]["coordinates"]) == 2  # outer ring and one hole
    shapes = {code: shape(f["geometry"]) for code, f in features.items()}
    assert all(s.is_valid for s in shapes.values())
    to_lonlat = pyproj.Transformer.from_crs(32632, 4326, always_xy=True)
    lon, lat = to_lonlat.transform([480_000, 480_400], [6_229_600, 6_230_000])
    domain = shapely.box(lon[0], lat[0], lon[1], lat[1])
    union = shapely.union_all(list(shapes.values()))
    assert union.intersection(domain).area > 0.8 * domain.area
    # the quadrants follow the terrain layout: SU north-west ... TC south-east
    world = build_world(DemoArchiveOptions(**TINY))
    for index, (code, easting, northing) in enumerate(
        [("SU", 480_050, 6_229_950), ("EW", 480_350, 6_229_950), ("HF", 480_050, 6_229_650)]
    ):
        assert province_index(world, np.array(easting), np.array(northing)) == index
        lon_lat = to_lonlat.transform(easting, northing)
        assert shapes[code].contains(shapely.Point(lon_lat))


def _read_checkpoints(path: Path) -> tuple[list[str], list[dict[str, str]]]:
    lines = path.read_text().splitlines()
    comments = [line for line in lines if line.startswith("#")]
    rows = list(csv.DictReader(line for line in lines if not line.startswith("#")))
    return comments, rows


def test_checkpoints_file(archive: Path) -> None:
    comments, rows = _read_checkpoints(archive / "checkpoints.csv")
    header = "\n".join(comments)
    for text in ("EPSG:5773", "EGM96", "EPSG:32632", "metre", "# survey_rmse_m: 0.02"):
        assert text in header
    assert list(rows[0]) == ["id", "easting", "northing", "height", "landcover"]
    assert len(rows) == 20 and len({row["id"] for row in rows}) == 20
    release = {p.stem: p for p in (archive / "release_2026_11").glob("*.tif")}
    grid = tile_layout(DemoArchiveOptions(**TINY))
    for row in rows:
        easting, northing = float(row["easting"]), float(row["northing"])
        assert 480_000 < easting < 480_400 and 6_229_600 < northing < 6_230_000
        assert row["landcover"] in {"1", "2", "3"}
        with rasterio.open(release[grid.tile_id(*grid.tile_of(easting, northing))]) as src:
            value = next(src.sample([(easting, northing)]))[0]
        assert value != NODATA


def test_clean_checkpoints_are_the_terrain(clean_archive: Path) -> None:
    comments, rows = _read_checkpoints(clean_archive / "checkpoints.csv")
    assert "# survey_rmse_m: 0.0" in comments
    world = build_world(clean_options(**TINY))
    easting = np.array([float(row["easting"]) for row in rows])
    northing = np.array([float(row["northing"]) for row in rows])
    heights = np.array([float(row["height"]) for row in rows])
    np.testing.assert_allclose(heights, true_terrain(world, easting, northing), atol=5e-4)


def test_checkpoint_count_scales_with_area() -> None:
    assert checkpoint_count(DemoArchiveOptions()) == 200
    assert checkpoint_count(DemoArchiveOptions(**TINY)) == 20
    assert checkpoint_count(DemoArchiveOptions(tiles_x=12, tiles_y=12)) == 800
    points = checkpoints(build_world(DemoArchiveOptions()))
    assert len(points.ids) == 200
    assert np.mean(points.land_cover == LandCover.OPEN_GROUND) > 0.5
    assert np.any(points.land_cover == LandCover.FOREST)


# --- the invented world ----------------------------------------------------------------------

DEFAULT_WORLD = build_world(DemoArchiveOptions())


def _province_sample(code: str, spacing_m: float = 20.0) -> tuple[np.ndarray, np.ndarray]:
    grid = DEFAULT_WORLD.grid
    easting, northing = np.meshgrid(
        np.arange(grid.west, grid.west + grid.width_m, spacing_m) + spacing_m / 2,
        np.arange(grid.north, grid.north - grid.height_m, -spacing_m) - spacing_m / 2,
    )
    inside = province_index(DEFAULT_WORLD, easting, northing) == list(PROVINCES).index(code)
    inside &= land_cover(DEFAULT_WORLD, easting, northing) != LandCover.WATER
    return easting[inside], northing[inside]


def test_province_characters() -> None:
    slope_deg = {}
    height = {}
    for code in PROVINCES:
        easting, northing = _province_sample(code)
        slope_deg[code] = np.degrees(np.arctan(terrain_slope(DEFAULT_WORLD, easting, northing)))
        height[code] = true_terrain(DEFAULT_WORLD, easting, northing)
    assert np.mean(slope_deg["SU"] > 30) > 0.02  # steep hills
    assert np.median(slope_deg["EW"]) < 5 and 40 < np.median(height["EW"]) < 90
    assert np.median(slope_deg["HF"]) < 1 and np.all(np.percentile(height["HF"], [5, 95]) > 1.5)
    assert np.percentile(height["HF"], 95) < 6
    assert np.percentile(height["TC"], 95) < 40


def test_land_cover_follows_the_provinces() -> None:
    share = {}
    for code in PROVINCES:
        grid = DEFAULT_WORLD.grid
        easting, northing = np.meshgrid(
            np.arange(grid.west + 10, grid.west + grid.width_m, 20.0),
            np.arange(grid.north - 10, grid.north - grid.height_m, -20.0),
        )
        inside = province_index(DEFAULT_WORLD, easting, northing) == list(PROVINCES).index(code)
        classes = land_cover(DEFAULT_WORLD, easting[inside], northing[inside])
        share[code] = {c: np.mean(classes == c) for c in LandCover}
    assert share["SU"][LandCover.FOREST] > 0.5
    assert 0.02 < share["EW"][LandCover.FOREST] < 0.4
    assert share["HF"][LandCover.WATER] > 0.05
    assert share["TC"][LandCover.WATER] > 0.1 and share["TC"][LandCover.BUILT_UP] > 0.02


_EASTING = st.floats(479_900, 484_900, allow_nan=False)
_NORTHING = st.floats(6_225_100, 6_230_100, allow_nan=False)


@settings(max_examples=200, deadline=None)
@given(easting=_EASTING, northing=_NORTHING)
def test_terrain_has_no_cliffs(easting: float, northing: float) -> None:
    here = true_terrain(DEFAULT_WORLD, np.array(easting), np.array(northing))
    east = true_terrain(DEFAULT_WORLD, np.array(easting + 1.0), np.array(northing))
    north = true_terrain(DEFAULT_WORLD, np.array(easting), np.array(northing + 1.0))
    assert np.isfinite(here) and -1e-9 <= here < 400
    assert abs(east - here) < 1.5 and abs(north - here) < 1.5  # under 56 degrees


@settings(max_examples=100, deadline=None)
@given(easting=_EASTING, northing=_NORTHING)
def test_weights_are_a_partition(easting: float, northing: float) -> None:
    weights = province_weights(DEFAULT_WORLD, np.array(easting), np.array(northing))
    assert sum(weights.values()) == pytest.approx(1.0)
    assert all(0 <= w <= 1 for w in weights.values())
    classes = land_cover(DEFAULT_WORLD, np.array([easting]), np.array([northing]))
    assert int(classes[0]) in {1, 2, 3, 4}


# --- error generators ------------------------------------------------------------------------


def test_random_error_grows_with_slope() -> None:
    rng = np.random.default_rng(0)
    flat = random_error(rng, np.zeros(200_000), sigma_m=0.3, slope_factor=0.5)
    steep = random_error(rng, np.ones(200_000), sigma_m=0.3, slope_factor=0.5)
    assert np.std(flat) == pytest.approx(0.3, rel=0.02)
    assert np.std(steep) == pytest.approx(0.8, rel=0.02)
    assert not random_error(rng, np.ones(10), sigma_m=0.0, slope_factor=0.5).any()


def test_blunders() -> None:
    errors = blunder_error(np.random.default_rng(0), (400, 400), fraction=0.01)
    hit = errors != 0
    assert hit.mean() == pytest.approx(0.01, rel=0.1)
    assert np.all((np.abs(errors[hit]) >= 5) & (np.abs(errors[hit]) <= 50))
    assert 0.4 < np.mean(errors[hit] > 0) < 0.6


def test_void_mask() -> None:
    mask = void_mask((VoidDisc(col=20.0, row=10.0, radius=5.0),), 40)
    assert mask[10, 20] and not mask[10, 26] and not mask[0, 0]
    assert mask.sum() == pytest.approx(np.pi * 25, rel=0.15)


# --- speed-ups that must not change the archive ---------------------------------------------

SHIPPED_DEMO = Path(__file__).resolve().parents[3] / "demo_tiles"
FLOAT32_STEP_M = 3.1e-5  # one float32 step between 256 and 512 m (2**-15 m); IEEE 754 binary32


def test_grid_evaluation_equals_the_pointwise_one() -> None:
    world = build_world(DemoArchiveOptions(tiles_x=2, tiles_y=2, pixels=300))
    for col, row in ((0, 0), (1, 1)):
        east_axis, north_axis = world.grid.pixel_axes(col, row)
        easting, northing = world.grid.pixel_centres(col, row)
        assert np.array_equal(np.broadcast_to(east_axis, easting.shape), easting)
        on_grid = true_terrain(world, east_axis, north_axis)
        pointwise = true_terrain(world, easting, northing)
        assert on_grid.shape == (300, 300) and on_grid.flags.writeable  # callers add to it
        # cos(a + b) as cos a cos b - sin a sin b: rounding only (heights up to 400 m)
        np.testing.assert_allclose(on_grid, pointwise, rtol=0, atol=1e-10)
        assert np.array_equal(
            land_cover(world, east_axis, north_axis), land_cover(world, easting, northing)
        )
        slope_grid = terrain_slope(world, east_axis, north_axis)
        np.testing.assert_allclose(slope_grid, terrain_slope(world, easting, northing), atol=1e-9)


def test_worker_processes_write_the_same_archive(archive: Path, tmp_path: Path) -> None:
    calls: list[tuple[int, int]] = []
    make_demo_archive(
        tmp_path,
        DemoArchiveOptions(**TINY, void_patches=20),
        workers=2,
        progress=lambda done, total: calls.append((done, total)),
    )
    for folder in FOLDERS:
        first, second = _arrays(archive / folder), _arrays(tmp_path / folder)
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
    assert _arrays(tmp_path / "landcover").keys() == _arrays(SHIPPED_DEMO / "landcover").keys()
    for name, shipped in _arrays(SHIPPED_DEMO / "landcover").items():
        assert np.array_equal(_arrays(tmp_path / "landcover")[name], shipped), name
    for folder in ("release_2026_11", "release_2026_11_update", "lidar_2021"):
        made, shipped = _arrays(tmp_path / folder), _arrays(SHIPPED_DEMO / folder)
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
        a.size * a.itemsize for folder in FOLDERS for a in _arrays(archive / folder).values()
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
