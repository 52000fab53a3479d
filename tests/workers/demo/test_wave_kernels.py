"""The compiled split of plane waves at near-affine positions (workers/demo/wave_kernels.py)
against the pointwise cosines of Waves (numpy), and where it must step aside."""

from __future__ import annotations

import numpy as np
import pytest

from demaudit.workers.demo import wave_kernels
from demaudit.workers.demo.wave_kernels import MAX_REMAINDER_RAD, affine_plane, near_affine_waves
from demaudit.workers.demo.waves import Waves, random_waves

pytestmark = pytest.mark.skipif(not wave_kernels.AVAILABLE, reason="numba is not installed")


def _waves(seed: int = 3) -> Waves:
    return random_waves(np.random.default_rng(seed), (60.0, 45.0, 30.0, 15.0), (250.0, 1500.0))


def _pointwise(waves: Waves, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """The numpy sum of cosines at the same points, as 1-D arrays (no fast path)."""
    return waves(x.ravel(), y.ravel()).reshape(x.shape)


def _rotated_positions(rows: int, cols: int, *, bend: float) -> tuple[np.ndarray, np.ndarray]:
    """Positions (metres) of a raster rotated by 3 degrees, 4 m pixels, far from the origin,
    bent quadratically by up to ``bend`` metres (like a map projection over a few km)."""
    i, j = np.mgrid[0:rows, 0:cols].astype(float)
    angle = np.radians(3.0)
    x = 12_345.6 + 4.0 * (np.cos(angle) * j - np.sin(angle) * i)
    y = -23_456.7 - 4.0 * (np.sin(angle) * j + np.cos(angle) * i)
    bump = bend * ((i / rows) ** 2 + (j / cols) ** 2) / 2
    return x + bump, y - 0.5 * bump


def test_affine_plane_passes_through_three_corners() -> None:
    x, _ = _rotated_positions(70, 90, bend=0.03)
    a0, di, dj = affine_plane(x)
    plane = a0 + di * np.arange(70)[:, None] + dj * np.arange(90)[None, :]
    assert np.abs(x - plane).max() <= 0.03 + 1e-9
    assert (x - plane)[0, 0] == (x - plane)[-1, 0] == (x - plane)[0, -1] == 0.0


@pytest.mark.parametrize("bend", [0.0, 0.04])
def test_split_equals_pointwise_cosines(bend: float) -> None:
    # tolerance: angles of a few hundred radians rounded differently (double precision,
    # IEEE 754: ~1e-13 rad) times the 60 m amplitude; common practice
    waves = _waves()
    x, y = _rotated_positions(80, 120, bend=bend)
    fast = near_affine_waves(
        x, y, kx=waves.kx, ky=waves.ky, phase=waves.phase, amplitude=waves.amplitude
    )
    assert fast is not None
    np.testing.assert_allclose(fast, _pointwise(waves, x, y), rtol=0, atol=1e-10)


def test_waves_take_the_split_on_a_2d_raster_and_agree() -> None:
    waves = _waves(seed=8)
    x, y = _rotated_positions(100, 100, bend=0.02)
    np.testing.assert_allclose(waves(x, y), _pointwise(waves, x, y), rtol=0, atol=1e-10)
    # a scalar y broadcasts (the 1-D wanders are called so)
    np.testing.assert_allclose(waves(x, 0.0), waves(x.ravel()).reshape(x.shape), atol=1e-10)


def test_split_steps_aside_far_from_affine_or_small() -> None:
    waves = _waves()
    options = dict(kx=waves.kx, ky=waves.ky, phase=waves.phase, amplitude=waves.amplitude)
    x, y = _rotated_positions(80, 120, bend=50.0)  # remainders of radians: series not exact
    assert np.abs(waves.kx).max() * 50.0 / 2 > MAX_REMAINDER_RAD
    assert near_affine_waves(x, y, **options) is None
    np.testing.assert_array_equal(waves(x, y), _pointwise(waves, x, y))  # pointwise fallback
    small_x, small_y = _rotated_positions(10, 10, bend=0.0)
    assert near_affine_waves(small_x, small_y, **options) is None
    assert near_affine_waves(x[0], y[0], **options) is None  # 1-D: pointwise
