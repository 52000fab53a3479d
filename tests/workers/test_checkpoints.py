"""Checkpoint reading (every row accounted for) and the bilinear sampling rule."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from pyproj import CRS
from scipy.ndimage import map_coordinates

from workers.checkpoints import bilinear_at, read_checkpoints
from workers.grid import Grid

CSV = """# horizontal_crs: EPSG:32632
# survey_rmse_m: 0.02
id,easting,northing,height,landcover
a,1.0,2.0,10.5,1
b,1.0,2.0,,1
a,3.0,4.0,11.0,2
c,x,4.0,11.0,2
d,5.0,6.0,12.0,
"""


def test_csv_rows_are_used_or_rejected_with_a_reason(tmp_path: Path):
    path = tmp_path / "cp.csv"
    path.write_text(CSV)
    data = read_checkpoints(path)
    assert [p.point_id for p in data.points] == ["a", "d"]
    assert data.points[1].landcover is None
    reasons = {r.point_id: r.reason for r in data.rejected}
    assert "no height" in reasons["b"]
    assert "duplicated id" in reasons["a"]
    assert "no coordinates" in reasons["c"]
    assert data.declared_crs == "EPSG:32632"
    assert data.header["survey_rmse_m"] == "0.02"


def test_geojson_points(tmp_path: Path):
    doc = {
        "type": "FeatureCollection",
        "features": [
            {
                "type": "Feature",
                "properties": {"id": "p1", "height": 5.0},
                "geometry": {"type": "Point", "coordinates": [8.7, 56.2]},
            },
            {
                "type": "Feature",
                "properties": {"id": "p2", "height": 5.0},
                "geometry": {"type": "LineString", "coordinates": [[8.7, 56.2], [8.8, 56.2]]},
            },
        ],
    }
    path = tmp_path / "cp.geojson"
    path.write_text(json.dumps(doc))
    data = read_checkpoints(path, landcover_column=None)
    assert [(p.point_id, p.x, p.y) for p in data.points] == [("p1", 8.7, 56.2)]
    assert "no coordinates" in data.rejected[0].reason


GRID = Grid(CRS.from_epsg(32632).to_wkt(), (2.0, 0.0, 100.0, 0.0, -2.0, 500.0), 20, 10)


def test_bilinear_matches_scipy_map_coordinates():
    # reference: scipy.ndimage.map_coordinates with order=1 (general-purpose library)
    rng = np.random.default_rng(0)
    heights = rng.normal(50, 5, GRID.shape)
    x = rng.uniform(102, 136, 50)
    y = rng.uniform(482, 498, 50)
    values, reasons = bilinear_at(heights, GRID, x, y)
    cols = (x - 100.0) / 2.0 - 0.5
    rows = (500.0 - y) / 2.0 - 0.5
    expected = map_coordinates(heights, [rows, cols], order=1)
    assert all(r is None for r in reasons)
    assert np.allclose(values, expected)


def test_voids_and_edges_are_named():
    heights = np.ones(GRID.shape)
    heights[5, 5] = np.nan
    values, reasons = bilinear_at(heights, GRID, np.array([111.0, 100.2]), np.array([489.0, 490.0]))
    assert np.isnan(values).all()
    assert "void" in reasons[0]
    assert "edge" in reasons[1]


@pytest.mark.parametrize("x", [101.0, 121.0, 139.0])
def test_points_on_pixel_centres_take_that_value(x):
    heights = np.arange(200, dtype=float).reshape(GRID.shape)
    values, reasons = bilinear_at(heights, GRID, np.array([x]), np.array([499.0 - 2 * 9]))
    col = round((x - 100.0) / 2.0 - 0.5)
    assert reasons[0] is None
    assert values[0] == pytest.approx(heights[9, col])
