"""Compiled sweep (numba) for workers/tile/derivatives.py: every derived parameter of one surface
in one pass over the pixels, instead of some thirty numpy passes. Pure; the numpy functions in
derivatives.py are its twin and the reference, and tests/workers/tile/test_derivatives.py holds
both to the same results.

``AVAILABLE`` is False when numba is not installed: derivatives.py then takes the numpy path.
Compiled code is cached on disk beside the module (once per installation).
"""

from __future__ import annotations

import math
from typing import Any

from demaudit.workers.compiled import AVAILABLE, compiled

__all__ = ["AVAILABLE", "surface_sweep"]


def _surface_sweep(z, dx, dy, slope, aspect, plan, profile, d8):  # type: ignore[no-untyped-def]
    """Fill slope, aspect (degrees), plan and profile curvature (1/m) and D8 codes of the
    interior pixels with a complete 3 x 3 window (the formulas of derivatives.py, in its order of
    operations); other pixels keep what the outputs held (NaN, NO_WINDOW)."""
    rows, cols = z.shape
    diagonal = math.hypot(dx, dy)
    distances = (dy, diagonal, dx, diagonal, dy, diagonal, dx, diagonal)
    offsets_r = (-1, -1, 0, 1, 1, 1, 0, -1)
    offsets_c = (0, 1, 1, 1, 0, -1, -1, -1)
    for i in range(1, rows - 1):
        for j in range(1, cols - 1):
            z1, z2, z3 = z[i - 1, j - 1], z[i - 1, j], z[i - 1, j + 1]
            z4, z5, z6 = z[i, j - 1], z[i, j], z[i, j + 1]
            z7, z8, z9 = z[i + 1, j - 1], z[i + 1, j], z[i + 1, j + 1]
            total = z1 + z2 + z3 + z4 + z5 + z6 + z7 + z8 + z9
            if not math.isfinite(total):
                continue
            east = ((z3 + 2 * z6 + z9) - (z1 + 2 * z4 + z7)) / (8 * dx)
            north = ((z1 + 2 * z2 + z3) - (z7 + 2 * z8 + z9)) / (8 * dy)
            slope[i, j] = math.degrees(math.atan(math.hypot(east, north)))
            if east != 0 or north != 0:
                aspect[i, j] = math.degrees(math.atan2(-east, -north)) % 360.0
            p = (z6 - z4) / (2 * dx)
            q = (z2 - z8) / (2 * dy)
            r = (z4 - 2 * z5 + z6) / (dx * dx)
            t = (z2 - 2 * z5 + z8) / (dy * dy)
            s = (z3 - z1 + z7 - z9) / (4 * dx * dy)
            g2 = p * p + q * q
            if g2 != 0:
                along = p * p * r + 2 * p * q * s + q * q * t
                across = q * q * r - 2 * p * q * s + p * p * t
                profile[i, j] = -along / (g2 * ((1 + g2) * math.sqrt(1 + g2)))
                plan[i, j] = -across / (g2 * math.sqrt(g2))
            best = 0.0
            code = 0
            for k in range(8):
                drop = (z5 - z[i + offsets_r[k], j + offsets_c[k]]) / distances[k]
                if drop > best:
                    best = drop
                    code = k + 1
            d8[i, j] = code


def surface_sweep(*args: Any) -> None:
    """The compiled _surface_sweep (compiled, or loaded from the disk cache, once per process)."""
    compiled(_surface_sweep)(*args)
