"""Checkpoint reading (every row accounted for) and the bilinear sampling rule."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from pyproj import CRS
from scipy.ndimage import map_coordinates

from demaudit.workers.checkpoints.points import bilinear_at, read_checkpoints
from demaudit.workers.tile.grid import Grid

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


# --- the file as a whole is checked before any row (columns, delimiter, encoding, CRS) -------


def _source(**fields: object):
    from demaudit.workers.spec import CheckpointSource

    return CheckpointSource(file="cp.csv", **fields)  # type: ignore[arg-type]


def test_renamed_columns_are_refused_naming_what_was_found(tmp_path: Path):
    from demaudit.workers.errors import SpecError

    path = tmp_path / "checkpoints.csv"
    path.write_text("# horizontal_crs: EPSG:32632\nid;x;y;z\na;1;2;3\n")
    with pytest.raises(SpecError) as err:
        read_checkpoints(path)
    assert str(err.value).startswith(
        "checkpoints.file: checkpoints.csv: no 'easting' / 'northing' / 'height' column; "
        "found: id;x;y;z (delimiter ';')"
    )


def test_semicolons_with_decimal_commas_are_read(tmp_path: Path):
    path = tmp_path / "cp.csv"
    path.write_text(
        "# horizontal_crs: EPSG:32632\n"
        "id;easting;northing;height;landcover\n"
        "a;512.345,67;6229000,5;10,25;1\n"
        "b;512345.5;6229001;-3,5;\n"
    )
    data = read_checkpoints(path)
    assert [(p.point_id, p.x, p.y, p.height) for p in data.points] == [
        ("a", 512345.67, 6229000.5, 10.25),
        ("b", 512345.5, 6229001.0, -3.5),
    ]


def test_tabs_are_read(tmp_path: Path):
    path = tmp_path / "cp.txt"
    path.write_text("id\teasting\tnorthing\theight\na\t1.5\t2\t3\n")
    assert [(p.x, p.height) for p in read_checkpoints(path).points] == [(1.5, 3.0)]


@pytest.mark.parametrize("encoding", ["utf-8", "utf-8-sig", "latin-1"])
def test_common_encodings_are_read(tmp_path: Path, encoding: str):
    path = tmp_path / "cp.csv"
    text = "# horizontal_crs: EPSG:32632\nid,easting,northing,height\nKøge,1,2,3\n"
    path.write_bytes(text.encode(encoding))
    data = read_checkpoints(path)
    assert [p.point_id for p in data.points] == ["Køge"]
    assert data.declared_crs == "EPSG:32632"


def test_binary_data_is_refused(tmp_path: Path):
    from demaudit.workers.errors import SpecError

    path = tmp_path / "cp.csv"
    path.write_bytes(b"PK\x03\x04\x00\x00binary")
    with pytest.raises(SpecError, match="cp.csv is not text"):
        read_checkpoints(path)


def test_no_crs_anywhere_is_a_spec_error(tmp_path: Path):
    from demaudit.workers.checkpoints.points import open_checkpoints
    from demaudit.workers.errors import SpecError

    path = tmp_path / "cp.csv"
    path.write_text("id,easting,northing,height\na,1,2,3\n")
    with pytest.raises(SpecError, match="checkpoints.crs: cp.csv declares no horizontal CRS"):
        open_checkpoints(path, _source())
    assert open_checkpoints(path, _source(crs="EPSG:32632")).points[0].height == 3.0


def test_an_unreadable_crs_is_a_spec_error(tmp_path: Path):
    from demaudit.workers.checkpoints.points import open_checkpoints
    from demaudit.workers.errors import SpecError

    path = tmp_path / "cp.csv"
    path.write_text("# horizontal_crs: EPSG:999999\nid,easting,northing,height\na,1,2,3\n")
    with pytest.raises(SpecError, match="cp.csv declares the CRS 'EPSG:999999', which cannot"):
        open_checkpoints(path, _source())


def test_a_file_without_a_usable_point_is_a_spec_error(tmp_path: Path):
    from demaudit.workers.checkpoints.points import open_checkpoints
    from demaudit.workers.errors import SpecError

    path = tmp_path / "cp.csv"
    path.write_text("# horizontal_crs: EPSG:32632\nid,easting,northing,height\na,1,2,\nb,1,2,\n")
    with pytest.raises(SpecError, match="none of the 2 points of cp.csv can be used"):
        open_checkpoints(path, _source())


def test_geojson_without_the_height_property_is_refused(tmp_path: Path):
    from demaudit.workers.errors import SpecError

    doc = {
        "type": "FeatureCollection",
        "features": [
            {
                "type": "Feature",
                "properties": {"id": "p1", "z": 5.0},
                "geometry": {"type": "Point", "coordinates": [8.7, 56.2]},
            }
        ],
    }
    path = tmp_path / "cp.geojson"
    path.write_text(json.dumps(doc))
    with pytest.raises(SpecError, match="no feature has a 'height' property; found: id, z"):
        read_checkpoints(path)
    path.write_text(json.dumps({"type": "FeatureCollection", "features": ["x"]}))
    with pytest.raises(SpecError, match="cp.geojson is not a list of feature objects"):
        read_checkpoints(path)
