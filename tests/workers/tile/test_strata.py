"""Slope and stratum masks."""

from __future__ import annotations

import numpy as np
import pytest

from demaudit.workers.tile.strata import ClassInfo, excluded_mask, slope_band_labels, stratum_masks
from demaudit.workers.tile.terrain import aspect_degrees, slope_degrees

CLASSES = (
    ClassInfo(1, "open ground", "non_vegetated"),
    ClassInfo(2, "forest", "vegetated"),
    ClassInfo(4, "water", "excluded"),
)


@pytest.mark.parametrize("degrees", [0.0, 10.0, 30.0, 60.0])
def test_slope_of_a_plane(degrees):
    cols = np.arange(20) * 2.0
    plane = np.tile(np.tan(np.radians(degrees)) * cols, (10, 1))
    slope = slope_degrees(plane, pixel_size_x_m=2.0, pixel_size_y_m=2.0)
    assert np.allclose(slope, degrees, atol=1e-9)


def test_slope_on_real_terrain_matches_numpy_gradient():
    # matplotlib's sample DEM (real terrain, 3 arc-second grid; ../shared/CHECK_VALUES.md)
    from matplotlib import cbook

    dem = cbook.get_sample_data("jacksboro_fault_dem.npz")
    z = np.asarray(dem["elevation"], dtype=float)
    dx = float(dem["dx"]) * 111_320.0 * np.cos(np.radians(float(dem["ymin"])))
    dy = float(dem["dy"]) * 110_574.0
    slope = slope_degrees(z, pixel_size_x_m=dx, pixel_size_y_m=dy)
    gy, gx = np.gradient(z, dy, dx)
    assert np.allclose(slope, np.degrees(np.arctan(np.sqrt(gx**2 + gy**2))))
    assert 0 < np.median(slope) < 45


def test_band_labels():
    assert slope_band_labels([0, 5, 15, 30, 45]) == ["0-5", "5-15", "15-30", "30-45", "45+"]


def test_masks_partition_the_pixels():
    rng = np.random.default_rng(0)
    cover = rng.choice([1.0, 2.0, 4.0, np.nan], size=(30, 30))
    slope = rng.uniform(0, 60, size=(30, 30))
    masks = stratum_masks(landcover=cover, classes=CLASSES, slope=slope, slope_edges=[0, 5, 15, 30])
    assert "landcover:water" not in masks
    bands = [k for k in masks if k.startswith("slope_deg:")]
    assert sum(masks[k].sum() for k in bands) == slope.size
    assert masks["cover_group:vegetated"].sum() == (cover == 2).sum()
    joint = masks["cover_group:non_vegetated/slope_deg:30+"]
    assert joint.sum() == ((cover == 1) & (slope >= 30)).sum()
    excluded = excluded_mask(cover, CLASSES)
    assert excluded is not None and excluded.sum() == (cover == 4).sum()
    assert excluded_mask(None, CLASSES) is None


@pytest.mark.parametrize(
    ("rise_east", "rise_north", "aspect"),
    [(1.0, 0.0, 270.0), (-1.0, 0.0, 90.0), (0.0, 1.0, 180.0), (0.0, -1.0, 0.0), (1.0, 1.0, 225.0)],
)
def test_aspect_points_downslope_clockwise_from_north(rise_east, rise_north, aspect):
    rows, cols = np.mgrid[0:10, 0:12].astype(float)
    east, north = cols * 2.0, -rows * 2.0  # rows run south
    z = 0.1 * (rise_east * east + rise_north * north)
    got = aspect_degrees(z, pixel_size_x_m=2.0, pixel_size_y_m=2.0)
    assert np.allclose(got, aspect)
