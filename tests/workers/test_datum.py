"""Vertical datum and units against published values and pyproj."""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest
from pyproj import CRS, Transformer

from workers.datum import (
    geoid_undulation,
    to_metres,
    undulation_on_grid,
    vertical_offset_on_grid,
)
from workers.errors import GeoidGridError
from workers.grid import Grid

# NGA's README for the EGM96 15' grid (published): (lat, lon east, N in metres). PROJ's bilinear
# interpolation of the 15' grid reproduces them within 0.06 m; tested with 0.1 m
# (../shared/CHECK_VALUES.md).
EGM96_TEST_POINTS = [
    (38.6281550, 269.7791550, -31.628),
    (-14.6212170, 305.0211140, -2.969),
    (46.8743190, 102.4487290, -43.575),
    (-23.6174460, 133.8747120, 15.871),
    (38.6254730, 359.9995000, 50.066),
    (-0.4667440, 0.0023000, 17.329),
]


@pytest.mark.parametrize(("lat", "lon_east", "expected"), EGM96_TEST_POINTS)
def test_egm96_undulation_matches_nga_test_points(lat: float, lon_east: float, expected: float):
    lon = lon_east - 360.0 if lon_east > 180 else lon_east
    n = geoid_undulation(np.array([lon]), np.array([lat]), vertical_crs="EPSG:5773")
    assert n[0] == pytest.approx(expected, abs=0.1)


def test_ellipsoidal_has_zero_undulation():
    n = geoid_undulation(np.array([8.7]), np.array([56.2]), vertical_crs="ellipsoidal")
    assert n[0] == 0.0


def test_missing_grid_is_an_error_not_a_silent_zero():
    # EGM2008 (EPSG:3855) needs us_nga_egm08_25.tif, which proj-data does not ship here; either
    # the grid is present and N is far from zero, or demaudit must refuse.
    try:
        n = geoid_undulation(np.array([8.7]), np.array([56.2]), vertical_crs="EPSG:3855")
    except GeoidGridError as exc:
        assert "EPSG:3855" in str(exc)
    else:
        assert abs(n[0]) > 10


def test_missing_egm96_grid_fails_loudly_in_a_fresh_process():
    # PROJ's data folders are process-wide: check with a process that knows no grid folder.
    code = (
        "import numpy as np\n"
        "from workers.datum import geoid_undulation\n"
        "geoid_undulation(np.array([8.7]), np.array([56.2]), vertical_crs='EPSG:5773',"
        " grid_dirs=('/nonexistent-grid-folder',))\n"
    )
    env = {k: v for k, v in os.environ.items() if k not in {"PROJ_DATA", "PROJ_LIB"}}
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    assert done.returncode != 0
    assert "GeoidGridError" in done.stderr and "egm96_15.gtx" in done.stderr


def test_units_are_exact():
    # NIST: international foot = 0.3048 m exactly; US survey foot = 1200/3937 m.
    assert to_metres(np.array([1.0]), "foot")[0] == 0.3048
    assert to_metres(np.array([3937.0]), "us_survey_foot")[0] == pytest.approx(1200.0, abs=1e-9)
    assert np.isnan(to_metres(np.array([np.nan]), "metre")[0])
    with pytest.raises(ValueError, match="furlong"):
        to_metres(np.array([1.0]), "furlong")


def utm_grid(width: int = 300, height: int = 200, res: float = 5.0) -> Grid:
    return Grid(
        CRS.from_epsg(32632).to_wkt(), (res, 0.0, 480_000.0, 0.0, -res, 6_230_000.0), width, height
    )


def test_lattice_interpolation_stays_within_a_millimetre():
    grid = utm_grid()
    lattice = undulation_on_grid(grid, vertical_crs="EPSG:5773")
    rows, cols = np.mgrid[0 : grid.height, 0 : grid.width]
    x, y = grid.pixel_centres(rows.astype(float), cols.astype(float))
    lon, lat = Transformer.from_crs(32632, 4326, always_xy=True).transform(x, y)
    exact = geoid_undulation(lon, lat, vertical_crs="EPSG:5773")
    assert np.max(np.abs(lattice - exact)) < 1e-3


def test_offset_from_orthometric_to_ellipsoidal_is_plus_n():
    grid = utm_grid(20, 10)
    offset = vertical_offset_on_grid(grid, from_crs="EPSG:5773", to_crs="ellipsoidal")
    n = undulation_on_grid(grid, vertical_crs="EPSG:5773")
    assert offset is not None
    assert np.allclose(offset, n)
    assert 35 < n.mean() < 45  # EGM96 near 56 N, 8.7 E is about +40 m (from memory; NGA grid)
    assert vertical_offset_on_grid(grid, from_crs="EPSG:5773", to_crs="EPSG:5773") is None
