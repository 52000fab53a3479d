"""Plane waves at the points of a near-affine 2-D array (a reprojected raster's pixel positions):
the angle of each wave splits into a row term, a column term and a small remainder, so a pixel
costs a few multiplications per wave instead of one cosine (compiled with numba).

cos(A_i + B_j + d) = (cos A_i cos B_j - sin A_i sin B_j) cos d - (sin A_i cos B_j + cos A_i
sin B_j) sin d, where A_i + B_j is the angle at the affine fit of the positions and d the angle
of their remainder (|d| <= MAX_REMAINDER_RAD, so the Taylor series of cos d and sin d to d**6
and d**5 are exact to within 2e-16). Equal to the pointwise cosines within a few 1e-15 of the
amplitudes (the angles round differently). Pure; the numpy path in waves.py is the reference.
"""

from __future__ import annotations

from importlib.util import find_spec
from typing import Any

import numpy as np

AVAILABLE = find_spec("numba") is not None
#: Largest remainder angle (radians) for which the series are used; beyond it, the caller
#: evaluates the cosines pointwise.
MAX_REMAINDER_RAD = 0.01
#: Smallest array (pixels) worth the split; smaller ones are evaluated pointwise.
MIN_PIXELS = 4096
_COMPILED: dict[str, Any] = {}


def _near_affine_sum(cos_a, sin_a, cos_b, sin_b, kx, ky, amplitude, rx, ry, out):  # type: ignore[no-untyped-def]
    """out[i, j] = sum_w amplitude[w] cos(A[i, w] + B[w, j] + kx[w] rx[i, j] + ky[w] ry[i, j])."""
    rows, cols = rx.shape
    for i in range(rows):
        for j in range(cols):
            out[i, j] = 0.0
        for w in range(kx.size):
            ca, sa, kx_w, ky_w, amp = cos_a[i, w], sin_a[i, w], kx[w], ky[w], amplitude[w]
            for j in range(cols):
                d = kx_w * rx[i, j] + ky_w * ry[i, j]
                d2 = d * d
                cos_d = 1.0 - d2 * (0.5 - d2 * (1.0 / 24.0 - d2 / 720.0))
                sin_d = d * (1.0 - d2 * (1.0 / 6.0 - d2 / 120.0))
                cos_ab = ca * cos_b[w, j] - sa * sin_b[w, j]
                sin_ab = sa * cos_b[w, j] + ca * sin_b[w, j]
                out[i, j] += amp * (cos_ab * cos_d - sin_ab * sin_d)
    return out


def _compiled() -> Any:
    if "sum" not in _COMPILED:
        from numba import njit

        try:
            _COMPILED["sum"] = njit(cache=True, nogil=True)(_near_affine_sum)
        except RuntimeError:  # no writable cache folder (read-only install): compile per process
            _COMPILED["sum"] = njit(cache=False, nogil=True)(_near_affine_sum)
    return _COMPILED["sum"]


def affine_split(a: np.ndarray) -> tuple[float, float, float, np.ndarray]:
    """A 2-D array as a0 + di * i + dj * j + remainder, the plane through three corners."""
    rows, cols = a.shape
    di = (a[-1, 0] - a[0, 0]) / (rows - 1)
    dj = (a[0, -1] - a[0, 0]) / (cols - 1)
    plane = a[0, 0] + di * np.arange(rows)[:, None] + dj * np.arange(cols)[None, :]
    return float(a[0, 0]), float(di), float(dj), a - plane


def near_affine_waves(
    x: np.ndarray,
    y: np.ndarray,
    *,
    kx: np.ndarray,
    ky: np.ndarray,
    phase: np.ndarray,
    amplitude: np.ndarray,
) -> np.ndarray | None:
    """sum(amplitude * cos(kx * x + ky * y + phase)) at 2-D arrays x, y of one shape, or None
    when the split does not apply (numba missing, too few pixels, positions too far from
    affine for the series)."""
    if not AVAILABLE or x.ndim != 2 or x.shape != y.shape or x.size < MIN_PIXELS:
        return None
    if min(x.shape) < 2:
        return None
    x0, xi, xj, rx = affine_split(x)
    y0, yi, yj, ry = affine_split(y)
    reach = np.abs(kx) * np.abs(rx).max() + np.abs(ky) * np.abs(ry).max()
    if not reach.max(initial=0.0) <= MAX_REMAINDER_RAD:
        return None
    rows, cols = x.shape
    a = (kx * x0 + ky * y0 + phase)[None, :] + np.arange(rows)[:, None] * (kx * xi + ky * yi)
    b = (kx * xj + ky * yj)[:, None] * np.arange(cols)[None, :]
    out = np.empty(x.shape)
    return np.asarray(
        _compiled()(np.cos(a), np.sin(a), np.cos(b), np.sin(b), kx, ky, amplitude, rx, ry, out)
    )
