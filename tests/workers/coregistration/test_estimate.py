"""Nuth & Kääb co-registration against known shifts, real terrain and an independent search."""

from __future__ import annotations

import numpy as np
import pytest
from matplotlib import cbook
from scipy.ndimage import map_coordinates

from demaudit.workers.coregistration.estimate import (
    LinearFit,
    nuth_kaab,
    sample_shifted,
    solve,
)
from demaudit.workers.errors import CannotEstimateError
from demaudit.workers.tile.terrain import aspect_degrees, slope_degrees

PIXEL = 5.0


def synthetic_terrain(east: np.ndarray, north: np.ndarray) -> np.ndarray:
    """Smooth hills with every slope direction (metres)."""
    return (
        100
        + 40 * np.sin(east / 300.0) * np.cos(north / 250.0)
        + 20 * np.sin((east + north) / 170.0)
        + 0.02 * east
    )


def grid(n: int = 240) -> tuple[np.ndarray, np.ndarray]:
    rows, cols = np.indices((n, n)).astype(float)
    return cols * PIXEL + PIXEL / 2, -(rows * PIXEL + PIXEL / 2)


def estimate(test: np.ndarray, reference: np.ndarray, pixel: float = PIXEL):
    slope = slope_degrees(reference, pixel_size_x_m=pixel, pixel_size_y_m=pixel)
    aspect = aspect_degrees(reference, pixel_size_x_m=pixel, pixel_size_y_m=pixel)
    return nuth_kaab(test, reference, slope, aspect, pixel_size_x_m=pixel, pixel_size_y_m=pixel)


@pytest.mark.parametrize(
    ("east", "north"),
    [(1.6, -0.9), (0.3, 0.2), (-0.4, 1.1), (-7.3, 4.1), (12.0, 0.0), (0.0, -9.5), (6.2, 6.2)],
)
def test_known_shift_is_recovered_on_synthetic_terrain(east: float, north: float):
    # exact truth: the test model's features sit (east, north) from the reference's
    e, n = grid()
    reference = synthetic_terrain(e, n)
    test = synthetic_terrain(e - east, n - north) + 0.25
    result = estimate(test, reference)
    assert abs(result.east_m - east) < 0.1 * PIXEL
    assert abs(result.north_m - north) < 0.1 * PIXEL
    assert abs(result.vertical_m - 0.25) < 0.02
    assert result.converged
    assert result.nmad_after_m < result.nmad_before_m


def test_noise_and_blunders_do_not_pull_the_shift():
    e, n = grid()
    rng = np.random.default_rng(3)
    reference = synthetic_terrain(e, n)
    test = synthetic_terrain(e - 1.6, n + 0.9) + 0.25 + rng.normal(0, 0.3, e.shape)
    hit = rng.random(e.shape) < 0.01
    test[hit] += rng.uniform(5, 50, hit.sum()) * rng.choice([-1, 1], hit.sum())
    result = estimate(test, reference)
    assert abs(result.east_m - 1.6) < 0.1 * PIXEL and abs(result.north_m + 0.9) < 0.1 * PIXEL
    assert abs(result.vertical_m - 0.25) < 0.02


def jacksboro() -> tuple[np.ndarray, float]:
    """matplotlib's sample DEM (real terrain, ../shared/CHECK_VALUES.md), in metres, with its
    pixel size in metres (3 arc-second grid: ~ 90 m north-south)."""
    dem = cbook.get_sample_data("jacksboro_fault_dem.npz")
    z = np.asarray(dem["elevation"], dtype=float)
    return z, float(dem["dy"]) * 110_574.0


def shift_real(z: np.ndarray, east_px: float, north_px: float) -> np.ndarray:
    """The DEM with its features moved east_px east and north_px north (cubic spline)."""
    rows, cols = np.indices(z.shape, dtype=float)
    return map_coordinates(z, [rows + north_px, cols - east_px], order=3, mode="nearest")


def brute_force_shift(test: np.ndarray, reference: np.ndarray, pixel: float) -> tuple[float, float]:
    """Independent estimate: the shift (0.05 px steps) minimising the NMAD of dh."""
    best = (np.inf, 0.0, 0.0)
    for coarse in (np.arange(-3, 3.01, 0.25), None):
        if coarse is None:
            ce, cn = best[1], best[2]
            steps_e = np.arange(ce - 0.25, ce + 0.2501, 0.05)
            steps_n = np.arange(cn - 0.25, cn + 0.2501, 0.05)
        else:
            steps_e = steps_n = coarse
        for se in steps_e:
            for sn in steps_n:
                moved = sample_shifted(
                    test,
                    east_m=se * pixel,
                    north_m=sn * pixel,
                    pixel_size_x_m=pixel,
                    pixel_size_y_m=pixel,
                )
                dh = (moved - reference)[10:-10, 10:-10]
                dh = dh[np.isfinite(dh)]
                nmad = 1.4826 * np.median(np.abs(dh - np.median(dh)))
                if nmad < best[0]:
                    best = (nmad, se, sn)
    return best[1], best[2]


def test_real_terrain_shift_is_recovered_and_agrees_with_brute_force():
    z, pixel = jacksboro()
    z = z[:120, :120]
    east_px, north_px = 1.3, -0.7
    test = shift_real(z, east_px, north_px) + 0.5
    result = estimate(test, z, pixel=pixel)
    assert abs(result.east_m / pixel - east_px) < 0.15
    assert abs(result.north_m / pixel - north_px) < 0.15
    be, bn = brute_force_shift(test, z, pixel)
    assert abs(be - east_px) < 0.15 and abs(bn - north_px) < 0.15
    assert abs(result.east_m / pixel - be) < 0.15 and abs(result.north_m / pixel - bn) < 0.15


def test_flat_terrain_cannot_estimate():
    e, n = grid(100)
    flat = 12.0 + 0.0 * e
    with pytest.raises(CannotEstimateError, match="stable pixels"):
        estimate(flat + 0.3, flat)


def test_one_slope_direction_cannot_estimate():
    e, n = grid(100)
    ramp = 0.2 * e  # every slope faces the same way: the shift along the contour is free
    with pytest.raises(CannotEstimateError, match="constrain|convergence|standard error"):
        estimate(0.2 * (e - 1.0) + 0.1, ramp)


def test_linear_fits_merge_like_one_fit():
    rng = np.random.default_rng(0)
    x = rng.normal(size=(1000, 3))
    y = x @ np.array([1.0, -2.0, 0.5]) + rng.normal(0, 0.1, 1000)
    whole = LinearFit.of(x, y)
    merged = LinearFit.of(x[:400], y[:400]).merge(LinearFit.of(x[400:], y[400:]))
    assert np.allclose(whole.xtx, merged.xtx) and np.allclose(whole.xty, merged.xty)
    beta = solve(merged, what="test").beta
    assert np.allclose(beta, np.linalg.lstsq(x, y, rcond=None)[0])


def test_sample_shifted_moves_features_back():
    e, n = grid(60)
    reference = synthetic_terrain(e, n)
    test = synthetic_terrain(e - 2.5, n - 5.0)  # features 2.5 m east, 5 m north
    back = sample_shifted(test, east_m=2.5, north_m=5.0, pixel_size_x_m=PIXEL, pixel_size_y_m=PIXEL)
    inner = np.isfinite(back)
    assert np.abs(back - reference)[inner].max() < 0.2
