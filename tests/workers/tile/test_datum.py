"""Vertical datum and units against published values and pyproj."""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pytest
from pyproj import CRS, Transformer

from demaudit.workers.errors import GeoidGridError
from demaudit.workers.outputs.summary_document import finest_graded_rmse, vertical_accuracy_cautions
from demaudit.workers.spec import Grading, JobSpec
from demaudit.workers.tile import datum
from demaudit.workers.tile.datum import (
    LonLatLattice,
    NodeLattice,
    bilinear_on_nodes,
    conversion_accuracy_m,
    geoid_undulation,
    to_metres,
    undulation_on_grid,
    vertical_offset_on_grid,
    vertical_transformation,
    vertical_transformations,
)
from demaudit.workers.tile.grid import Grid

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
        "from demaudit.workers.tile.datum import geoid_undulation\n"
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


def test_undulation_on_a_gentle_grid_matches_per_pixel_proj():
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


# --- N at every pixel against per-pixel PROJ, where EGM96 is steepest -------------------------
# EGM96 slopes (from the 15' grid itself): about 0.35 m/km south of the Himalaya (30 N, 79.5 E)
# and 0.31 m/km over the Puerto Rico trench (19 N, 66.25 W), the steepest outside polar regions.
STEEP_SITES = {
    "puerto_rico_trench": (32619, 760_000.0, 2_130_000.0),
    "himalaya": (32644, 330_000.0, 3_345_000.0),
}


def utm_tile(epsg: int, left: float, top: float, res: float, size: int) -> Grid:
    return Grid(CRS.from_epsg(epsg).to_wkt(), (res, 0.0, left, 0.0, -res, top), size, size)


def proj_per_pixel(grid: Grid, vertical_crs: str = "EPSG:5773") -> np.ndarray:
    """The reference: pyproj/PROJ itself at every pixel centre (grid CRS -> WGS 84 lon/lat, then
    the geoid transformation with errcheck), the slow exact way."""
    rows, cols = np.indices(grid.shape, dtype=np.float64)
    x, y = grid.pixel_centres(rows, cols)
    lon, lat = Transformer.from_crs(grid.pyproj_crs, 4326, always_xy=True).transform(x, y)
    return geoid_undulation(lon, lat, vertical_crs=vertical_crs)


@pytest.mark.parametrize("site", sorted(STEEP_SITES))
@pytest.mark.parametrize(("res", "size"), [(30.0, 1000), (90.0, 600)])
def test_undulation_on_grid_matches_per_pixel_proj_where_the_geoid_is_steep(
    site: str, res: float, size: int
):
    # Reference: pyproj 3.7 / PROJ 9 evaluating egm96_15.gtx at every pixel (Issue 11: <= 1 mm).
    epsg, left, top = STEEP_SITES[site]
    grid = utm_tile(epsg, left, top, res, size)
    exact = proj_per_pixel(grid)
    n = undulation_on_grid(grid, vertical_crs="EPSG:5773")
    assert np.isfinite(n).all()
    assert np.max(np.abs(n - exact)) <= 1e-3
    # the site is discriminating: N interpolated from a 64-pixel lattice (the former method,
    # which misses the grid's kinks between its nodes) is off by far more than 1 mm here
    lattice = LonLatLattice.of(grid, step_px=64)
    coarse = lattice.to_pixels(geoid_undulation(lattice.lon, lattice.lat, vertical_crs="EPSG:5773"))
    assert np.max(np.abs(coarse - exact)) > 5e-3


def test_undulation_on_a_tile_across_the_antimeridian_matches_per_pixel_proj():
    # UTM 60 S, 180 E at 17 S (Fiji): longitudes jump from +180 to -180 inside the tile.
    # Reference: pyproj/PROJ per pixel.
    grid = utm_tile(32760, 780_000.0, 8_140_000.0, 90.0, 500)
    lon = Transformer.from_crs(32760, 4326, always_xy=True).transform(
        grid.bounds[0::2], [grid.bounds[3]] * 2
    )[0]
    assert lon[0] > 0 > lon[1]  # the tile does cross the antimeridian
    exact = proj_per_pixel(grid)
    assert np.max(np.abs(undulation_on_grid(grid, vertical_crs="EPSG:5773") - exact)) <= 1e-3


def test_a_wrong_node_model_falls_back_to_per_pixel_proj(monkeypatch: pytest.MonkeyPatch):
    # A lattice misread by half a cell fails the self-check at the lattice points; the result
    # must still be PROJ's (reference: pyproj per pixel), not the wrong model's.
    good = datum._node_lattice("EPSG:5773", datum.DEFAULT_GRID_DIRS)
    assert good is not None
    shifted = NodeLattice(
        good.lon0 + good.dlon / 2, good.lat0, good.dlon, good.dlat, good.rows, good.cols
    )
    monkeypatch.setattr(datum, "_node_lattice", lambda *_: shifted)
    sizes: list[int] = []
    proj = datum._proj_undulation

    def counting(lon, lat, *args):  # type: ignore[no-untyped-def]
        sizes.append(np.size(lon))
        return proj(lon, lat, *args)

    monkeypatch.setattr(datum, "_proj_undulation", counting)
    grid = utm_tile(*STEEP_SITES["puerto_rico_trench"], 90.0, 120)
    n = undulation_on_grid(grid, vertical_crs="EPSG:5773")
    assert max(sizes) == 120 * 120  # PROJ was asked at every pixel
    assert np.max(np.abs(n - proj_per_pixel(grid))) <= 1e-3


def test_egm96_node_lattice_is_read_with_corner_registration():
    # egm96_15.gtx header (read with struct: lat0 -90, lon0 -180, 0.25 x 0.25 degrees, 721 rows
    # x 1440 columns; GTX nodes are at the cell corners). GDAL shows it north-up, so the lattice
    # runs from 90 N southwards and from 180 W eastwards, and goes round the globe.
    nodes = datum._node_lattice("EPSG:5773", datum.DEFAULT_GRID_DIRS)
    assert nodes == NodeLattice(-180.0, 90.0, 0.25, 0.25, 721, 1440)
    assert nodes.period == 1440


def _plane(lon: np.ndarray, lat: np.ndarray) -> np.ndarray:
    return 3.0 + 0.5 * lon - 0.25 * lat + 0.125 * lon * lat


def test_bilinear_on_nodes_reproduces_a_bilinear_function_and_is_nan_outside():
    # A bilinear function of (lon, lat) is reproduced exactly by bilinear interpolation
    # (common practice); points beyond the nodes, or not finite, get NaN.
    nodes = NodeLattice(lon0=10.0, lat0=50.0, dlon=0.5, dlat=0.25, rows=9, cols=11)
    lon = np.array([10.0, 10.3, 12.77, 15.0, 9.99, 12.0, np.nan, 12.0])
    lat = np.array([50.0, 49.1, 48.0, 48.0, 49.0, 50.01, 49.0, np.inf])
    asked: list[int] = []

    def values(lo: np.ndarray, la: np.ndarray) -> np.ndarray:
        asked.append(lo.size)
        return _plane(lo, la)

    got = bilinear_on_nodes(lon, lat, nodes, values)
    assert np.allclose(got[:4], _plane(lon[:4], lat[:4]), atol=1e-12)
    assert np.isnan(got[4:]).all()
    assert len(asked) == 1 and asked[0] <= nodes.rows * nodes.cols


def test_bilinear_on_nodes_wraps_round_the_globe():
    # A global grid (360 / dlon columns): between the last column (179 E) and 180 E = 180 W the
    # interpolation uses the first column; longitudes a turn apart give the same value.
    nodes = NodeLattice(lon0=-180.0, lat0=10.0, dlon=1.0, dlat=1.0, rows=3, cols=360)
    assert nodes.period == 360

    def values(lo: np.ndarray, la: np.ndarray) -> np.ndarray:
        return np.where(np.isclose(lo, -180.0) | np.isclose(lo, 180.0), 10.0, 0.0) + la

    got = bilinear_on_nodes(
        np.array([179.25, -180.0, 539.25]), np.array([9.0, 9.0, 9.0]), nodes, values
    )
    assert got == pytest.approx([9.0 + 0.25 * 10.0, 19.0, 9.0 + 0.25 * 10.0])


def test_offset_between_two_vertical_references_is_the_difference_of_their_n():
    grid = utm_grid(40, 30)
    n = undulation_on_grid(grid, vertical_crs="EPSG:5773")
    back = vertical_offset_on_grid(grid, from_crs="ellipsoidal", to_crs="EPSG:5773")
    assert back is not None and np.allclose(back, -n)


# --- PROJ's stated accuracy of the conversions --------------------------------------------------


def test_egm96_conversion_accuracy_is_what_proj_states():
    # PROJ's database (EPSG:10084, "WGS 84 to EGM96 height (1)") states 1 m; pyproj reports it
    # as Transformer.accuracy. Identical references need no conversion.
    assert conversion_accuracy_m(from_crs="EPSG:5773", to_crs="ellipsoidal") == 1.0
    assert conversion_accuracy_m(from_crs="ellipsoidal", to_crs="EPSG:5773") == 1.0
    assert conversion_accuracy_m(from_crs="EPSG:5773", to_crs="EPSG:5773") == 0.0
    record = vertical_transformation(from_crs="EPSG:5773", to_crs="ellipsoidal")
    assert record is not None and record["accuracy_m"] == 1.0
    assert record["from"] == "EPSG:5773" and record["to"] == "ellipsoidal"
    assert any("EGM96" in op for op in record["operations"])
    assert vertical_transformation(from_crs="ellipsoidal", to_crs="ellipsoidal") is None


def test_navd88_without_its_grid_is_refused_not_reported():
    # NAVD88 (EPSG:5703) needs a GEOID grid that proj-data does not ship here; PROJ then offers
    # only a ballpark step with no accuracy, which demaudit refuses (as for N itself). If the
    # grid is installed, PROJ's accuracy is metre-level (NAD83 -> WGS 84 in the chain).
    try:
        accuracy = conversion_accuracy_m(from_crs="EPSG:5703", to_crs="ellipsoidal")
    except GeoidGridError as exc:
        assert "EPSG:5703" in str(exc)
    else:
        assert accuracy is None or accuracy >= 0.5


def _spec(**grading: object) -> JobSpec:
    return JobSpec.model_validate(
        {
            "name": "vertical",
            "test": {"tiles": "t/*.tif", "vertical_crs": "ellipsoidal"},
            "reference": {"tiles": "r/*.tif", "vertical_crs": "EPSG:5773"},
            "grading": grading,
        }
    )


def test_job_conversions_carry_proj_accuracy_and_caution_against_a_finer_class():
    spec = _spec(standards=["asprs2014"], asprs_class_cm=10.0)
    records = vertical_transformations(spec)
    assert [(r["role"], r["from"], r["to"], r["accuracy_m"]) for r in records] == [
        ("reference", "EPSG:5773", "ellipsoidal", 1.0)
    ]
    # 1 m (PROJ) is coarser than the ASPRS 10 cm class: one caution naming both
    (caution,) = vertical_accuracy_cautions(records, spec.grading)
    assert "1 m" in caution and "ASPRS 10 cm" in caution
    # a class coarser than the stated accuracy needs no caution
    assert (
        vertical_accuracy_cautions(records, Grading(standards=["asprs2014"], asprs_class_cm=150))
        == []
    )
    unknown = [records[0] | {"accuracy_m": None}]
    assert "no accuracy" in vertical_accuracy_cautions(unknown, spec.grading)[0]


def test_finest_graded_class_is_the_smallest_rmse_among_the_standards_graded():
    # QL0 RMSE_z 5 cm (workers/checkpoints/grading.py, USGS lidar base specification, from memory)
    grading = Grading(
        standards=["asprs2023", "quality_level", "user"],
        asprs_class_cm=10.0,
        quality_level="QL0",
        user={"required_rmse_m": 0.2},
    )
    assert finest_graded_rmse(grading) == (0.05, "quality level QL0")
    assert finest_graded_rmse(Grading(standards=["nssda"])) is None
    assert finest_graded_rmse(Grading(standards=["user"], user={"required_rmse_m": 0.02})) == (
        0.02,
        "user-defined RMSE",
    )


def test_missing_grid_on_a_raster_grid_is_an_error_not_a_silent_zero():
    # EGM2008 (EPSG:3855) needs us_nga_egm08_25.tif, absent from proj-data here (see above).
    grid = utm_grid(20, 10)
    try:
        n = undulation_on_grid(grid, vertical_crs="EPSG:3855")
    except GeoidGridError as exc:
        assert "EPSG:3855" in str(exc)
    else:
        assert np.all(np.abs(n) > 10)
