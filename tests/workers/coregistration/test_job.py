"""The job-wide shift from the tiles' own estimates (pure, no cluster): medians, standard errors
against a Monte Carlo, outlier tiles, region medians."""

from __future__ import annotations

import numpy as np
import pytest
from pyproj import CRS
from shapely.geometry import box

from demaudit.workers.coregistration.job import (
    MEDIAN_SE_FACTOR,
    MIN_TILES,
    median_standard_error,
    outlier_tiles,
    region_medians,
    tile_median,
)
from demaudit.workers.coregistration.shift import ShiftEstimate
from demaudit.workers.coregistration.tile import Correction
from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.inputs.regions import Region
from demaudit.workers.tile.grid import Grid

KEYS = ("east_m", "north_m", "vertical_m", "tilt_east_m_per_km", "tilt_north_m_per_km")


@pytest.mark.parametrize("n", [41, 101, 401])
def test_median_standard_error_factor_matches_monte_carlo(n):
    # the standard error of the median of n normal values is sqrt(pi / 2) sigma / sqrt(n)
    # asymptotically (textbook: the median's efficiency is 2 / pi); numpy Monte Carlo
    rng = np.random.default_rng(n)
    sigma = 0.7
    medians = np.median(rng.normal(3.0, sigma, (20_000, n)), axis=1)
    assert abs(MEDIAN_SE_FACTOR - 1.2533) < 1e-4
    assert MEDIAN_SE_FACTOR * sigma / np.sqrt(n) == pytest.approx(medians.std(), rel=0.03)


def test_median_standard_error_of_samples_matches_monte_carlo():
    # the NMAD-based estimate from each sample, on average, equals the medians' real spread
    rng = np.random.default_rng(5)
    samples = rng.normal(0.0, 2.0, (20_000, 101))
    estimates = [median_standard_error(s) for s in samples]
    assert np.mean(estimates) == pytest.approx(np.median(samples, axis=1).std(), rel=0.03)
    assert np.isnan(median_standard_error(np.array([])))


def test_tile_median_standard_errors_match_the_spread_of_job_estimates():
    # repeat the job estimate over many sets of 41 tiles whose estimates scatter normally: the
    # reported *_se values must equal the spread of the reported medians (numpy Monte Carlo)
    rng = np.random.default_rng(11)
    truth = {"east_m": 1.6, "north_m": -0.9, "vertical_m": 0.25}
    truth |= {"tilt_east_m_per_km": 0.1, "tilt_north_m_per_km": -0.2}
    scatter = {"east_m": 0.4, "north_m": 0.3, "vertical_m": 0.05}
    scatter |= {"tilt_east_m_per_km": 0.02, "tilt_north_m_per_km": 0.03}
    jobs = []
    for _ in range(3_000):
        records = {
            f"t{i}": ShiftEstimate(
                "ok", values={k: truth[k] + rng.normal(0, scatter[k]) for k in KEYS}
            )
            for i in range(41)
        }
        estimate = tile_median(records, Correction(), fit_tilt=True)
        correction, report = estimate.correction, estimate.report
        assert correction is not None and report["status"] == "ok"
        jobs.append(report)
    for key, se_key in [
        ("east_m", "east_se_m"),
        ("north_m", "north_se_m"),
        ("vertical_m", "vertical_se_m"),
        ("tilt_east_m_per_km", "tilt_east_m_per_km_se"),
    ]:
        spread = np.std([j[key] for j in jobs])
        stated = np.mean([j[se_key] for j in jobs])
        # NMAD / sqrt(n) (without sqrt(pi / 2)) states ~ 0.78 of the real spread
        assert stated == pytest.approx(spread, rel=0.05), key


def _ok(**values: float) -> ShiftEstimate:
    return ShiftEstimate("ok", values={k: values.get(k, 0.0) for k in KEYS})


def test_too_few_tiles_cannot_estimate_and_name_the_tiles_that_could_not():
    estimates = {
        "a": _ok(east_m=1.0),
        "b": _ok(east_m=1.2),
        "c": ShiftEstimate("cannot_estimate", "too flat"),
    }
    estimate = tile_median(estimates, Correction(), fit_tilt=True)
    assert estimate.correction is None and MIN_TILES == 3
    assert estimate.report["status"] == "cannot_estimate"
    assert estimate.report["tiles_estimated"] == 2
    assert estimate.report["tiles_not_estimated"] == {"c": "too flat"}


def test_the_job_correction_is_the_median_with_the_tilt_only_when_fitted():
    # medians worked by hand: east 1.0, 1.2, 5.0 -> 1.2; tilt 0.1, 0.2, 0.3 m/km -> 0.2 m/km
    estimates = {
        "a": _ok(east_m=1.0, north_m=-0.5, vertical_m=0.2, tilt_east_m_per_km=0.1),
        "b": _ok(east_m=1.2, north_m=-0.4, vertical_m=0.3, tilt_east_m_per_km=0.2),
        "c": _ok(east_m=5.0, north_m=-0.6, vertical_m=0.25, tilt_east_m_per_km=0.3),
    }
    origin = Correction(origin_east=100.0, origin_north=200.0)
    with_tilt = tile_median(estimates, origin, fit_tilt=True).correction
    assert with_tilt is not None
    assert (with_tilt.east_m, with_tilt.north_m, with_tilt.vertical_m) == (1.2, -0.5, 0.25)
    assert with_tilt.tilt_east == pytest.approx(0.2 / 1000)
    assert (with_tilt.origin_east, with_tilt.origin_north) == (100.0, 200.0)
    without = tile_median(estimates, origin, fit_tilt=False).correction
    assert without is not None and without.tilt_east == 0.0


def test_a_tile_far_from_the_job_is_an_outlier_only_beyond_the_floor():
    centre = dict.fromkeys(KEYS, 0.0)
    spread = dict.fromkeys(KEYS, 0.01)  # 3 NMADs = 0.03: the floors decide
    estimates = {"near": _ok(east_m=0.4, vertical_m=0.09), "far": _ok(east_m=0.6, vertical_m=0.2)}
    # floors: 0.5 m east, 0.1 m vertical (workers/coregistration/job.py OUTLIER_FLOORS)
    assert outlier_tiles(estimates, centre, spread) == {"far": {"east_m": 0.6, "vertical_m": 0.2}}


def _tile(tile_id: str, left: float, bottom: float) -> TileInfo:
    grid = Grid(
        CRS.from_epsg(32632).to_wkt(), (10.0, 0.0, left, 0.0, -10.0, bottom + 100.0), 10, 10
    )
    return TileInfo(tile_id, f"{tile_id}.tif", grid, None, "float32", 0, "")


def test_region_medians_take_the_tiles_whose_centre_lies_in_the_region():
    tiles = [_tile("a", 0, 0), _tile("b", 100, 0), _tile("c", 200, 0)]
    crs = tiles[0].grid.crs
    west = Region("W", "west", box(0, 0, 160, 100), crs)  # holds the centres of a and b
    estimates = {
        "a": _ok(east_m=1.0),
        "b": _ok(east_m=2.0),
        "c": _ok(east_m=9.0),
    }
    got = region_medians(estimates, tiles, {crs: [west]})
    assert got == {"W": {"tiles": 2} | dict.fromkeys(KEYS, 0.0) | {"east_m": 1.5}}
    failed = estimates | {"b": ShiftEstimate("failed", "unreadable")}
    assert region_medians(failed, tiles, {crs: [west]})["W"]["tiles"] == 1
