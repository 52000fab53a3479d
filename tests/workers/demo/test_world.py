"""The invented world of the demo archive (workers/demo: options, waves, world, surface,
release): pure functions of coordinates and seeds."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from demaudit.workers.demo.archive import clean_options
from demaudit.workers.demo.options import PROVINCES, DemoArchiveOptions, LandCover
from demaudit.workers.demo.release import (
    VoidDisc,
    blunder_error,
    random_error,
    release_tile,
    void_mask,
)
from demaudit.workers.demo.surface import land_cover, terrain_slope, true_terrain
from demaudit.workers.demo.world import (
    DemoWorld,
    ProvinceLayout,
    _smoothstep,
    build_world,
    place,
    province_index,
    province_weights,
)
from tests.support.demo_files import TINY


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


@pytest.mark.parametrize(
    "bad", [{"tiles_x": 0}, {"pixels": 4}, {"pixel_size_m": 0.0}, {"blunder_fraction": 2.0}]
)
def test_options_are_checked(bad: dict[str, float]) -> None:
    with pytest.raises(ValueError):
        DemoArchiveOptions(**bad)  # type: ignore[arg-type]


def test_banded_blend_weights_equal_the_full_smoothstep_on_every_tile() -> None:
    # the band (where the blend is strictly between 0 and 1) is found from the border's
    # extremes; outside it every value must still be exactly what the full formula gives
    world = build_world(DemoArchiveOptions(tiles_x=8, tiles_y=8, pixels=60))
    banded = 0
    for col, row in world.grid.tiles():
        at = place(world, *world.grid.pixel_axes(col, row))
        layout = ProvinceLayout(world, at)
        for extremes, name, width in (
            (layout.west_range, "to_west", world.blend_m),
            (layout.west_range, "to_west", world.blend_m / 4),
            (layout.north_range, "to_north", world.blend_m),
        ):
            got = layout._step(extremes, width, name)
            full = _smoothstep(getattr(layout, name) / width)
            assert np.array_equal(np.broadcast_to(got, full.shape), full), (col, row, name)
            banded += isinstance(got, np.ndarray)
    assert banded >= 8  # tiles crossed by a border took the banded path
