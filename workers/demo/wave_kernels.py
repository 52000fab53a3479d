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

from typing import Any

import numpy as np

from demaudit.workers.compiled import AVAILABLE, compiled

__all__ = ["AVAILABLE", "MAX_REMAINDER_RAD", "MIN_PIXELS", "affine_plane", "near_affine_waves"]

#: Largest remainder angle (radians) for which the series are used; beyond it, the caller
#: evaluates the cosines pointwise.
MAX_REMAINDER_RAD = 0.01
#: Smallest array (pixels) worth the split; smaller ones are evaluated pointwise.
MIN_PIXELS = 4096


def _near_affine_sum(x, y, plane_x, plane_y, cos_a, sin_a, cos_b, sin_b, waves, limit, out):  # type: ignore[no-untyped-def]
    """out[i, j] = sum_w amplitude[w] cos(A[i, w] + B[w, j] + d), d = kx[w] rx + ky[w] ry with
    (rx, ry) the remainder of (x, y) from the planes (origin, row step, column step); waves
    holds kx, ky, amplitude as rows. Returns False (out unfinished) if a row's remainders may give
    |d| > limit."""
    rows, cols = x.shape
    rx = np.empty(cols)
    ry = np.empty(cols)
    reach_x = np.abs(waves[0]).max()
    reach_y = np.abs(waves[1]).max()
    for i in range(rows):
        largest_x = 0.0
        largest_y = 0.0
        for j in range(cols):
            rx[j] = x[i, j] - (plane_x[0] + plane_x[1] * i + plane_x[2] * j)
            ry[j] = y[i, j] - (plane_y[0] + plane_y[1] * i + plane_y[2] * j)
            largest_x = max(largest_x, abs(rx[j]))
            largest_y = max(largest_y, abs(ry[j]))
            out[i, j] = 0.0
        if not reach_x * largest_x + reach_y * largest_y <= limit:
            return False
        for w in range(waves.shape[1]):
            ca, sa = cos_a[i, w], sin_a[i, w]
            kx_w, ky_w, amp = waves[0, w], waves[1, w], waves[2, w]
            for j in range(cols):
                d = kx_w * rx[j] + ky_w * ry[j]
                d2 = d * d
                cos_d = 1.0 - d2 * (0.5 - d2 * (1.0 / 24.0 - d2 / 720.0))
                sin_d = d * (1.0 - d2 * (1.0 / 6.0 - d2 / 120.0))
                cos_ab = ca * cos_b[w, j] - sa * sin_b[w, j]
                sin_ab = sa * cos_b[w, j] + ca * sin_b[w, j]
                out[i, j] += amp * (cos_ab * cos_d - sin_ab * sin_d)
    return True


def _compiled() -> Any:
    return compiled(_near_affine_sum)


def affine_plane(a: np.ndarray) -> np.ndarray:
    """(a0, di, dj) of the plane a0 + di * i + dj * j through three corners of a 2-D array."""
    rows, cols = a.shape
    return np.array(
        [a[0, 0], (a[-1, 0] - a[0, 0]) / (rows - 1), (a[0, -1] - a[0, 0]) / (cols - 1)], float
    )


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
    plane_x, plane_y = affine_plane(x), affine_plane(y)
    rows, cols = x.shape
    row_step = kx * plane_x[1] + ky * plane_y[1]
    a = (kx * plane_x[0] + ky * plane_y[0] + phase)[None, :] + np.arange(rows)[:, None] * row_step
    b = (kx * plane_x[2] + ky * plane_y[2])[:, None] * np.arange(cols)[None, :]
    waves = np.stack([kx, ky, amplitude]).astype(float)
    out = np.empty(x.shape)
    args = (np.cos(a), np.sin(a), np.cos(b), np.sin(b), waves, MAX_REMAINDER_RAD, out)
    if not _compiled()(x, y, plane_x, plane_y, *args):
        return None
    return out
