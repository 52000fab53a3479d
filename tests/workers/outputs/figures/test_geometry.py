"""Map placement (figures/geometry.py): scale-bar lengths in metres (projected and
longitude/latitude maps), the job's outline in longitude/latitude, map units, tile corners."""

from __future__ import annotations

import numpy as np
import pytest

from demaudit.workers.outputs.figures import geometry


@pytest.mark.parametrize(("span", "length"), [(4800, 1000), (10_000, 2000), (333, 50), (41, 10)])
def test_scale_bar_is_a_round_length_under_a_quarter_of_the_map(span, length):
    assert geometry.nice_length(span) == length


def test_outline_in_lonlat():
    # EPSG:32632 (UTM zone 32N): central meridian 9 deg E, false easting 500 km (EPSG registry)
    lon, lat = geometry.outline_lonlat((499_000, 0, 501_000, 1000), "EPSG:32632")
    assert lon[0] == lon[-1] and lat[0] == lat[-1]
    assert np.mean(lon) == pytest.approx(9.0, abs=0.01)
    assert lat.min() == pytest.approx(0.0, abs=1e-6)
    assert geometry.metre_units("EPSG:32632") and not geometry.metre_units("EPSG:4326")


@pytest.mark.parametrize("lat", [0.0, 45.0, 70.0, -33.9])
def test_metres_per_degree_of_longitude_match_pyproj_geod(lat):
    from pyproj import Geod

    # a 0.001 degree step along the parallel on WGS84 (pyproj's Geod.inv; the geodesic and the
    # parallel differ by far less than the tolerance over such a step)
    _, _, metres = Geod(ellps="WGS84").inv(10.0, lat, 10.001, lat)
    assert geometry.metres_per_degree_lon(lat) == pytest.approx(metres * 1000, rel=1e-6)


def test_geographic_maps_get_a_scale_bar_in_metres_along_the_centre_parallel():
    extent = (10.0, 59.0, 11.0, 60.0)
    frame = geometry.map_frame("EPSG:4326", extent)
    assert frame.geographic and frame.centre_lat == 59.5
    assert frame.aspect == pytest.approx(1 / np.cos(np.radians(59.5)))
    bar = geometry.scale_bar(frame, extent)
    assert bar is not None
    per_degree = geometry.metres_per_degree_lon(59.5)
    assert bar.length_units * per_degree == pytest.approx(bar.length_m)
    assert bar.length_m <= per_degree / 4 and bar.length_m == geometry.nice_length(per_degree)
    assert "latitude 59.50" in bar.label and bar.label.startswith("10 km")


def test_projected_maps_in_feet_get_a_scale_bar_in_metres():
    # EPSG:2263 (NY Long Island, US survey foot; EPSG registry); 1 ftUS = 1200/3937 m (NIST)
    extent = (1_000_000.0, 200_000.0, 1_040_000.0, 230_000.0)
    frame = geometry.map_frame("EPSG:2263", extent)
    # the Lambert conformal conic's scale near its standard parallels is within 1e-4 of 1
    assert frame.parallel_scale == pytest.approx(1.0, abs=1e-4)
    assert frame.metres_per_unit == pytest.approx(1200 / 3937 / frame.parallel_scale)
    bar = geometry.scale_bar(frame, extent)
    assert bar is not None and bar.length_m == 2000  # a quarter of 12.2 km, rounded down
    assert bar.length_units == pytest.approx(2000 / frame.metres_per_unit)
    assert geometry.scale_bar(geometry.map_frame(None, extent), extent) is None


def test_tile_corners():
    corners = geometry.tile_corners([(0, 1, 2, 4), (5, 5, 6, 6)])
    assert corners.shape == (2, 4, 2)
    assert corners[0].tolist() == [[0, 1], [2, 1], [2, 4], [0, 4]]


def test_scale_bar_on_web_mercator_is_true_at_the_map_centre():
    # Web Mercator's scale factor is sec(latitude) (Snyder 1987, Map Projections - A Working
    # Manual, Mercator, eq. 7-8 on the sphere): at 60 degrees one map metre is half a metre
    from pyproj import Transformer

    x, y = Transformer.from_crs("EPSG:4326", "EPSG:3857", always_xy=True).transform(10.0, 60.0)
    extent = (x - 20_000, y - 20_000, x + 20_000, y + 20_000)
    frame = geometry.map_frame("EPSG:3857", extent)
    assert frame.metres_per_unit == pytest.approx(0.5, rel=1e-3)
    bar = geometry.scale_bar(frame, extent)
    assert bar is not None and bar.length_m == 5000  # a quarter of 20 km on the ground, rounded
    assert bar.length_units == pytest.approx(10_000, rel=1e-3)
    assert bar.label == "5 km (at the map's centre)"


def test_utm_scale_bar_within_its_scale_factor():
    # UTM's scale factor on the central meridian is 0.9996 (EPSG:32632 parameters)
    extent = (499_000.0, 6_600_000.0, 501_000.0, 6_602_000.0)
    frame = geometry.map_frame("EPSG:32632", extent)
    assert frame.metres_per_unit == pytest.approx(1 / 0.9996, rel=1e-6)
    assert geometry.scale_bar(frame, extent).label == "500 m"
