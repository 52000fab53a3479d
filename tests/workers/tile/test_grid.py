"""centres_in: the shortcut for tiles wholly inside or outside the geometries gives what
rasterizing gives (rasterio.features.rasterize, pixel centres, all_touched=False)."""

from __future__ import annotations

import numpy as np
import pytest
from rasterio.features import rasterize
from shapely.geometry import Polygon, box

from demaudit.workers.tile.grid import Grid, centres_in

UTM32 = "EPSG:32632"


def rasterized(geometries, grid: Grid) -> np.ndarray:
    burned = rasterize(
        [(g, 1) for g in geometries],
        out_shape=grid.shape,
        transform=grid.affine,
        fill=0,
        all_touched=False,
        dtype="uint8",
    )
    return burned.astype(bool)


NORTH_UP = Grid(UTM32, (5.0, 0.0, 1000.0, 0.0, -5.0, 2000.0), 40, 30)  # x 1000-1200, y 1850-2000
ROTATED = Grid(UTM32, (4.0, 1.5, 1000.0, 1.5, -4.0, 2000.0), 40, 30)

CASES = {
    "far inside": box(900, 1700, 1300, 2100),
    "far outside": box(5000, 5000, 6000, 6000),
    # the centres' hull is x 1002.5-1197.5, y 1852.5-1997.5: these edges run through centres
    "edge through the first column of centres": box(1002.5, 1700, 1300, 2100),
    "edge through the last row of centres": box(900, 1852.5, 1300, 2100),
    "just outside the centres": box(1197.6, 1700, 1300, 2100),
    "half": box(1100, 1700, 1300, 2100),
    "with a hole over the tile": Polygon(
        box(900, 1700, 1300, 2100).exterior.coords, [box(1050, 1900, 1060, 1910).exterior.coords]
    ),
}


@pytest.mark.parametrize("grid", [NORTH_UP, ROTATED], ids=["north-up", "rotated"])
@pytest.mark.parametrize("name", list(CASES))
def test_centres_in_equals_rasterizing(grid: Grid, name: str) -> None:
    geometry = CASES[name]
    np.testing.assert_array_equal(centres_in([geometry], grid), rasterized([geometry], grid))


def test_wholly_inside_and_outside_take_the_shortcut() -> None:
    # the shortcut's answers (no rasterizing needed) for the two common cases
    assert centres_in([CASES["far inside"]], NORTH_UP).all()
    assert not centres_in([CASES["far outside"]], NORTH_UP).any()
    # one of several geometries holding the tile is enough; all must miss it for none
    both = [CASES["far outside"], CASES["far inside"]]
    assert centres_in(both, NORTH_UP).all()


def test_a_one_row_grid_is_rasterized() -> None:
    grid = Grid(UTM32, (5.0, 0.0, 1000.0, 0.0, -5.0, 2000.0), 40, 1)
    geometry = CASES["far inside"]
    np.testing.assert_array_equal(centres_in([geometry], grid), rasterized([geometry], grid))
