"""Slope bands without the arctangent against np.digitize on slope_degrees (np.gradient)."""

from __future__ import annotations

import numpy as np
import pytest

from demaudit.workers.tile import kernels
from demaudit.workers.tile.terrain import slope_bands, slope_degrees


@pytest.fixture(autouse=True, params=["compiled", "numpy"])
def backend(request: pytest.FixtureRequest, monkeypatch: pytest.MonkeyPatch) -> str:
    """Every test runs on the compiled loops (workers/tile/kernels.py) and on the numpy path."""
    if request.param == "compiled" and not kernels.AVAILABLE:
        pytest.skip("numba is not installed")
    monkeypatch.setattr(kernels, "AVAILABLE", request.param == "compiled")
    return str(request.param)


def digitized(z: np.ndarray, edges, px: float, py: float) -> np.ndarray:
    # Reference: numpy.digitize of the slope from numpy.gradient
    # (demaudit.workers.tile.terrain.slope_degrees).
    slope = slope_degrees(z, pixel_size_x_m=px, pixel_size_y_m=py)
    band = np.digitize(slope, edges) - 1
    return np.where(np.isfinite(slope) & (band >= 0), band, len(edges))


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("seed", range(12))
def test_bands_equal_digitized_slope(seed: int, dtype: type) -> None:
    rng = np.random.default_rng(seed)
    rows, cols = (int(v) for v in rng.integers(2, 50, 2))
    px, py = (float(v) for v in rng.uniform(0.5, 30, 2))
    edges = [0.0, 5.0, 15.0, 30.0, 45.0] if seed % 2 else sorted(rng.uniform(0.5, 89, 4))
    z = rng.normal(0, rng.uniform(0.1, 30), (rows, cols)).cumsum(axis=1)
    z[rng.random(z.shape) < 0.05] = np.nan
    z = z.astype(dtype)
    got = slope_bands(z, edges, pixel_size_x_m=px, pixel_size_y_m=py)
    np.testing.assert_array_equal(got, digitized(z, edges, px, py))


@pytest.mark.parametrize("dtype", [np.float64, np.float32])
@pytest.mark.parametrize("degrees", [5.0, 15.0, 30.0])
def test_planes_on_an_edge_fall_as_digitize_puts_them(degrees: float, dtype: type) -> None:
    # A plane rising at exactly an edge's slope: rounding decides the side, and it must be
    # the same side as the arctangent path's.
    edges = [0.0, 5.0, 15.0, 30.0, 45.0]
    rows, cols = 7, 9
    z = np.tan(np.radians(degrees)) * 2.0 * np.arange(cols)[None, :] + np.zeros((rows, 1))
    z = z.astype(dtype)
    got = slope_bands(z, edges, pixel_size_x_m=2.0, pixel_size_y_m=2.0)
    np.testing.assert_array_equal(got, digitized(z, edges, 2.0, 2.0))


def test_flat_ground_is_the_first_band_and_nan_is_none() -> None:
    z = np.zeros((4, 5))
    z[0, 0] = np.nan
    got = slope_bands(z, [0.0, 5.0], pixel_size_x_m=1.0, pixel_size_y_m=1.0)
    assert got[2, 2] == 0
    assert got[0, 0] == 2 and got[0, 1] == 2 and got[1, 0] == 2  # NaN reaches its neighbours
    assert slope_bands(np.zeros((1, 5)), [0.0], pixel_size_x_m=1, pixel_size_y_m=1).tolist() == [
        [1] * 5
    ]


def test_edges_below_the_first_edge_are_no_band() -> None:
    z = np.zeros((3, 3))
    assert (slope_bands(z, [2.0, 10.0], pixel_size_x_m=1.0, pixel_size_y_m=1.0) == 2).all()


@pytest.mark.parametrize("edges", [[5.0, 5.0], [-1.0, 5.0], [10.0, 95.0], []])
def test_bad_edges_are_refused(edges) -> None:
    with pytest.raises(ValueError, match="edges"):
        slope_bands(np.zeros((3, 3)), edges, pixel_size_x_m=1.0, pixel_size_y_m=1.0)
