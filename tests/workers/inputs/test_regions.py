"""Region files: anything but a GeoJSON FeatureCollection of polygons is refused with one message
naming the file; invalid polygons are repaired with all of their area, and say so."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from pyproj import CRS

from demaudit.workers.errors import SpecError
from demaudit.workers.inputs.regions import read_regions, region_cautions, region_mask
from demaudit.workers.tile.grid import Grid

# a 100 x 100 grid of 1 m pixels, origin (0, 100), in a projected CRS
GRID = Grid(CRS.from_epsg(32632).to_wkt(), (1.0, 0.0, 0.0, 0.0, -1.0, 100.0), 100, 100)
CRS_MEMBER = {"type": "name", "properties": {"name": "EPSG:32632"}}


def _collection(*geometries: dict, crs: dict | None = CRS_MEMBER) -> dict:
    doc: dict = {
        "type": "FeatureCollection",
        "features": [
            {"type": "Feature", "properties": {"code": f"R{i}"}, "geometry": g}
            for i, g in enumerate(geometries)
        ],
    }
    if crs is not None:
        doc["crs"] = crs
    return doc


def _write(tmp_path: Path, doc: object, name: str = "regions.geojson") -> Path:
    path = tmp_path / name
    path.write_text(json.dumps(doc))
    return path


def test_a_bow_tie_keeps_both_lobes_and_says_so(tmp_path: Path):
    # ring (10,10) -> (90,90) -> (90,10) -> (10,90) crosses itself at (50,50): two triangles of
    # 40 x 80 / 2 = 1,600 m2 each
    bow_tie = {
        "type": "Polygon",
        "coordinates": [[[10, 10], [90, 90], [90, 10], [10, 90], [10, 10]]],
    }
    regions = read_regions(_write(tmp_path, _collection(bow_tie)), id_property="code")
    assert regions[0].geometry.area == pytest.approx(3_200.0)
    left = {"type": "Polygon", "coordinates": [[[10, 10], [50, 50], [10, 90], [10, 10]]]}
    right = {"type": "Polygon", "coordinates": [[[90, 10], [90, 90], [50, 50], [90, 10]]]}
    triangles = read_regions(
        _write(tmp_path, _collection(left, right), "t.geojson"), id_property="code"
    )
    expected = sum(int(region_mask(t, GRID).sum()) for t in triangles)
    assert int(region_mask(regions[0], GRID).sum()) == expected > 3_000
    (note,) = region_cautions(regions)
    assert "feature 0 of regions.geojson (code 'R0')" in note
    assert "Self-intersection" in note and "make_valid into 2 polygons" in note


def test_valid_regions_carry_no_note(tmp_path: Path):
    square = {"type": "Polygon", "coordinates": [[[0, 0], [10, 0], [10, 10], [0, 10], [0, 0]]]}
    regions = read_regions(_write(tmp_path, _collection(square)), id_property="code")
    assert region_cautions(regions) == [] and regions[0].geometry.area == 100


def test_a_degenerate_polygon_is_refused_with_its_id(tmp_path: Path):
    flat = {"type": "Polygon", "coordinates": [[[0, 0], [10, 0], [20, 0], [0, 0]]]}
    with pytest.raises(SpecError, match=r"feature 0 of regions.geojson \(code 'R0'\).*no area"):
        read_regions(_write(tmp_path, _collection(flat)), id_property="code")


def test_a_line_is_not_a_region(tmp_path: Path):
    line = {"type": "LineString", "coordinates": [[0, 0], [10, 10]]}
    with pytest.raises(SpecError, match="is a LineString; regions must be polygons"):
        read_regions(_write(tmp_path, _collection(line)), id_property="code")


def test_a_shapefile_is_named_as_such(tmp_path: Path):
    path = tmp_path / "provinces.shp"
    path.write_bytes(b"\x00\x00\x27\x0a" + bytes(96))
    with pytest.raises(SpecError, match="provinces.shp is a shapefile; expected a GeoJSON"):
        read_regions(path, id_property="code")


def test_binary_data_is_refused(tmp_path: Path):
    path = tmp_path / "regions.geojson"
    path.write_bytes(bytes(np.arange(256, dtype=np.uint8)) * 4)
    with pytest.raises(SpecError, match="regions.geojson is not UTF-8 text"):
        read_regions(path, id_property="code")


@pytest.mark.parametrize(
    ("doc", "found"),
    [
        ([1, 2], "holds a list; expected a GeoJSON FeatureCollection"),
        ({"type": "Feature", "geometry": None}, "holds a GeoJSON 'Feature' object; expected"),
        ({"type": "FeatureCollection", "features": {"a": 1}}, "'features' must be a list"),
        (
            {"type": "FeatureCollection", "features": ["x"]},
            "feature 0 of regions.geojson is a string",
        ),
        (
            {"type": "FeatureCollection", "features": [{"properties": ["a"]}]},
            "has properties that are a list",
        ),
        (
            {"type": "FeatureCollection", "features": [{"properties": {"code": "A"}}]},
            r"feature 0 of regions.geojson \(code 'A'\) has no valid geometry",
        ),
    ],
)
def test_json_that_is_not_a_feature_collection_is_named(tmp_path: Path, doc: object, found: str):
    with pytest.raises(SpecError, match=found):
        read_regions(_write(tmp_path, doc), id_property="code")


def test_latin1_bytes_in_json_are_refused_not_a_traceback(tmp_path: Path):
    path = tmp_path / "regions.geojson"
    square = {"type": "Polygon", "coordinates": [[[0, 0], [10, 0], [10, 10], [0, 10], [0, 0]]]}
    text = json.dumps(_collection(square), ensure_ascii=False).replace("R0", "Ø")
    path.write_bytes(text.encode("latin-1"))
    with pytest.raises(SpecError, match="regions.geojson is not UTF-8 text"):
        read_regions(path, id_property="code")


@pytest.mark.parametrize(
    "outline",
    [
        [(-50, -50), (150, -50), (150, 150), (-50, 150)],  # covers the grid: its box, no overlay
        [(0, 0), (100, 0), (100, 100), (0, 100)],  # the grid's own outline: covers it too
        [(-50, -50), (60, -50), (40, 150), (-50, 150)],  # part of the grid: the overlay
        [(-50, -50), (150, -50), (150, 150), (-50, 150), (-50, -50), (20, 20), (70, 30), (30, 80)],
    ],
)
def test_clipping_to_a_tile_keeps_the_pixels_of_the_region(outline: list) -> None:
    from shapely.geometry import Polygon, box

    from demaudit.workers.inputs.regions import Region, clip_to

    ring = outline if len(outline) < 6 else None
    geometry = Polygon(ring) if ring else Polygon(outline[:4], [outline[5:]])  # with a hole
    region = Region("R", "R", geometry, GRID.crs)
    [clipped] = clip_to([region], GRID.bounds)
    np.testing.assert_array_equal(region_mask(clipped, GRID), region_mask(region, GRID))
    assert clipped.geometry.equals(geometry.intersection(box(*GRID.bounds)))
