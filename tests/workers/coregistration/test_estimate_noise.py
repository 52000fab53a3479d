"""Statistics after co-registration keep the test model's random error (the test pixels stay as
delivered; the reference is what moves), through the tile task on real GeoTIFFs."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from matplotlib import cbook
from pyproj import CRS, Geod
from rasterio.transform import from_origin
from scipy.ndimage import map_coordinates, zoom

from demaudit.workers.coregistration.estimate import solve
from demaudit.workers.coregistration.tile import Correction, reference_grid
from demaudit.workers.inputs.catalog import TileInfo, scan_tile
from demaudit.workers.spec import Coregistration
from demaudit.workers.stats.summary import statistics
from demaudit.workers.tile import task as tile_task
from demaudit.workers.tile.grid import Grid
from demaudit.workers.tile.task import OK, TileOptions, audit_tile, estimate_tile, read_mosaics

UTM32 = "EPSG:32632"
#: matplotlib's sample DEM (a 3 arc-second grid, ~ 90 m) resampled by UPSAMPLE: its heights are
#: whole metres, so at its own pixel size a bilinear resampling alone is off by ~ 2.3 m (NMAD);
#: a cubic spline at 30 m gives the same landscape smooth at pixel scale (~ 0.3 m).
UPSAMPLE = 3
PIXEL = 30.0
WINDOW = 160  # original pixels (a 480 x 480 grid after upsampling)
MARGIN = 12  # test tile = the reference's extent less this many pixels on each side
SIGMA = 2.0
SHIFTS_PX = [(0.6, 0.35), (-0.3, 0.5), (0.25, -0.7)]


def jacksboro() -> np.ndarray:
    """A window of matplotlib's sample DEM (real terrain; ../shared/CHECK_VALUES.md), metres,
    cubic-spline upsampled to PIXEL."""
    dem = cbook.get_sample_data("jacksboro_fault_dem.npz")
    z = np.asarray(dem["elevation"], dtype=float)[:WINDOW, :WINDOW]
    return zoom(z, UPSAMPLE, order=3)


def shifted(z: np.ndarray, east_px: float, north_px: float) -> np.ndarray:
    """z with its features moved east_px east and north_px north (cubic spline, exact for the
    purpose: its error is far below the noise)."""
    rows, cols = np.indices(z.shape, dtype=float)
    return map_coordinates(z, [rows + north_px, cols - east_px], order=3, mode="nearest")


def write_pair(
    root: Path,
    write_tif: Callable[..., Path],
    east_px: float,
    north_px: float,
    *,
    sigma: float,
    seed: int,
) -> tuple[TileInfo, TileInfo]:
    """Reference = the sample DEM; test = an inner window of it moved (east_px, north_px) plus
    white Gaussian noise of sigma, on the same pixel lattice (UTM 32N, ellipsoidal heights)."""
    z = jacksboro()
    rng = np.random.default_rng(seed)
    test = shifted(z, east_px, north_px)[MARGIN:-MARGIN, MARGIN:-MARGIN]
    test = test + rng.normal(0.0, sigma, test.shape)
    west, north = 500_000.0, 4_000_000.0
    ref_path = write_tif(
        root / "ref.tif", z, crs=UTM32, transform=from_origin(west, north, PIXEL, PIXEL)
    )
    test_transform = from_origin(west + MARGIN * PIXEL, north - MARGIN * PIXEL, PIXEL, PIXEL)
    test_path = write_tif(root / "test.tif", test, crs=UTM32, transform=test_transform)
    found = scan_tile(test_path), scan_tile(ref_path)
    assert isinstance(found[0], TileInfo) and isinstance(found[1], TileInfo)
    return found[0], found[1]


def options(estimate_from: str, correction: Correction | None = None) -> TileOptions:
    return TileOptions(
        coregistration=Coregistration(estimate_from=estimate_from, apply=True, fit_tilt=True),  # type: ignore[arg-type]
        correction=correction,
    )


@pytest.mark.parametrize(("east_px", "north_px"), SHIFTS_PX)
@pytest.mark.parametrize("estimate_from", ["job", "tile"])
def test_random_error_survives_the_correction(
    tmp_path, tif_writer, east_px, north_px, estimate_from
):
    test, reference = write_pair(tmp_path, tif_writer, east_px, north_px, sigma=SIGMA, seed=7)
    truth = Correction(east_m=east_px * PIXEL, north_m=north_px * PIXEL)
    result = audit_tile(test, [reference], [], options(estimate_from, truth))
    assert result.status == OK and result.corrected is not None
    if estimate_from == "tile":
        record = result.coregistration or {}
        assert record["status"] == "ok"
        assert abs(record["east_m"] / PIXEL - east_px) < 0.1
        assert abs(record["north_m"] / PIXEL - north_px) < 0.1
    after = statistics(result.corrected.summary)
    # white noise of known sigma: the corrected dh must keep it (NMAD = sigma for normal data,
    # 1.4826 MAD; common practice). Resampling the *test* instead averages neighbouring noisy
    # pixels: measured 1.10 to 1.23 m (0.55 to 0.62 sigma) for these shifts before the fix.
    assert after["nmad"] == pytest.approx(SIGMA, rel=0.03)
    assert abs(after["median"]) < 0.05 * SIGMA
    assert after["count"] > 0.95 * test.grid.width * test.grid.height


@pytest.mark.parametrize(("east_px", "north_px"), SHIFTS_PX)
def test_noise_free_correction_moves_the_right_way(tmp_path, tif_writer, east_px, north_px):
    # without noise the corrected dh is only the reference's bilinear resampling error; a shift
    # applied with the wrong sign would leave twice the shift (tens of metres on these slopes)
    test, reference = write_pair(tmp_path, tif_writer, east_px, north_px, sigma=0.0, seed=0)
    truth = Correction(east_m=east_px * PIXEL, north_m=north_px * PIXEL)
    result = audit_tile(test, [reference], [], options("job", truth))
    assert result.corrected is not None
    before, after = statistics(result.summary), statistics(result.corrected.summary)
    assert after["nmad"] < 0.1 * before["nmad"]
    assert after["nmad"] < 0.5


def test_pooled_passes_recover_the_shift(tmp_path, tif_writer):
    # the job-wide pooled estimate iterates estimate_tile's normal equations (as
    # service/coregistration._pooled does); on one noisy tile they must find the injected shift
    east_px, north_px = 0.6, -0.45
    test, reference = write_pair(tmp_path, tif_writer, east_px, north_px, sigma=SIGMA, seed=3)
    opts = options("job")
    x, y = test.grid.centre_coordinates()
    at = Correction(origin_east=float(x.mean()), origin_north=float(y.mean()))
    for _ in range(8):
        equations = estimate_tile(test, [reference], [], opts, [], at)
        assert equations is not None
        fit = solve(equations.shift, what="horizontal shift")
        at = replace(at, east_m=at.east_m + fit.beta[1], north_m=at.north_m + fit.beta[0])
        if np.hypot(fit.beta[0], fit.beta[1]) / PIXEL < 0.01:
            break
    assert abs(at.east_m / PIXEL - east_px) < 0.05
    assert abs(at.north_m / PIXEL - north_px) < 0.05


def test_a_shift_beyond_the_read_margin_reads_the_reference_again(
    tmp_path, tif_writer, monkeypatch
):
    # 10 px is beyond the margin read with the tile (COREGISTRATION_MARGIN_PX): the reference
    # is read again around the shifted grid, and no pixel is lost (the reference reaches 12 px
    # beyond the test tile)
    east_px, north_px = 10.4, -9.6
    assert max(abs(east_px), abs(north_px)) > tile_task.COREGISTRATION_MARGIN_PX
    test, reference = write_pair(tmp_path, tif_writer, east_px, north_px, sigma=SIGMA, seed=5)
    reads = []

    def counted(*args, **kwargs):
        reads.append(args[1])
        return read_mosaics(*args, **kwargs)

    monkeypatch.setattr(tile_task, "read_mosaics", counted)
    truth = Correction(east_m=east_px * PIXEL, north_m=north_px * PIXEL)
    result = audit_tile(test, [reference], [], options("job", truth))
    assert len(reads) == 2 and result.corrected is not None
    after = statistics(result.corrected.summary)
    assert after["count"] == test.grid.width * test.grid.height
    assert after["nmad"] == pytest.approx(SIGMA, rel=0.03)  # common practice: NMAD = sigma


@pytest.mark.parametrize(("east_m", "north_m"), [(12.5, -7.0), (-3.0, 20.0)])
def test_reference_grid_moves_pixel_centres_by_minus_the_shift(east_m, north_m):
    projected = Grid(CRS.from_epsg(32632).to_wkt(), (5.0, 0.0, 480_000.0, 0.0, -5.0, 6.23e6), 4, 3)
    x, y = projected.centre_coordinates()
    mx, my = reference_grid(projected, east_m=east_m, north_m=north_m).centre_coordinates()
    assert np.allclose(mx, x - east_m) and np.allclose(my, y - north_m)
    # geographic grid at 60 N: metres become degrees; the distance moved, measured on the
    # ellipsoid with pyproj.Geod, is the shift's length (Grid.pixel_size_m's spherical scale
    # factors are good to ~ 0.5 %)
    res = 1.0 / 1200.0
    geographic = Grid(CRS.from_epsg(4326).to_wkt(), (res, 0.0, 10.0, 0.0, -res, 60.0), 4, 3)
    lon, lat = geographic.centre_coordinates()
    mlon, mlat = reference_grid(geographic, east_m=east_m, north_m=north_m).centre_coordinates()
    azimuth, _, distance = Geod(ellps="WGS84").inv(lon, lat, mlon, mlat)
    assert np.allclose(distance, np.hypot(east_m, north_m), rtol=0.01)
    expected = np.degrees(np.arctan2(-east_m, -north_m))  # clockwise from north
    assert np.allclose(azimuth, expected, atol=0.5)
