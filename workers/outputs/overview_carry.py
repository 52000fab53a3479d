"""Overview cells of a re-check's map carried over from its baseline (pure numpy on the arrays
given): which overlaps of kept and recomputed footprints each tile holds, and cells set from the
baseline or blanked (ResultsStore.carry_overview).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from numpy.typing import NDArray

Bounds = tuple[float, float, float, float]


def overlaps_by_owner(
    keep: Mapping[str, Sequence[float]],
    blank: Mapping[str, Sequence[float]],
    order: Mapping[str, int],
) -> tuple[list[Bounds], list[Bounds]]:
    """The overlaps of kept and blanked footprints: those where the kept tile is listed first
    (it holds them), and those where the blanked one is (a tile gone is listed last)."""
    kept_first: list[Bounds] = []
    blank_first: list[Bounds] = []
    for gone, g in blank.items():
        for kept, k in keep.items():
            common = (max(g[0], k[0]), max(g[1], k[1]), min(g[2], k[2]), min(g[3], k[3]))
            if common[0] >= common[2] or common[1] >= common[3]:
                continue
            first = order.get(kept, math.inf) < order.get(gone, math.inf)
            (kept_first if first else blank_first).append(common)
    return kept_first, blank_first


def fill_cells(
    new: Any,
    x: NDArray[np.float64],
    y: NDArray[np.float64],
    bounds: Sequence[float],
    source: tuple[Any, NDArray[np.float64], NDArray[np.float64]] | None,
) -> None:
    """Set the overview cells inside bounds from source (array, its x, its y), or NaN."""
    rows, cols = window(x, y, bounds)
    if rows.stop <= rows.start or cols.stop <= cols.start:
        return
    if source is None:
        new[rows, cols] = np.nan
        return
    old, old_x, old_y = source
    old_rows, old_cols = window(old_x, old_y, bounds)
    new[rows, cols] = old[old_rows, old_cols]


def window(
    x: NDArray[np.float64], y: NDArray[np.float64], bounds: Sequence[float]
) -> tuple[slice, slice]:
    """Rows and columns of the overview cells whose centres lie inside bounds."""
    left, bottom, right, top = bounds
    cols = np.flatnonzero((x > left) & (x < right))
    rows = np.flatnonzero((y > bottom) & (y < top))
    if cols.size == 0 or rows.size == 0:
        return slice(0, 0), slice(0, 0)
    return slice(int(rows[0]), int(rows[-1]) + 1), slice(int(cols[0]), int(cols[-1]) + 1)
