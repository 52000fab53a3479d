"""Exact tail bins without a logarithm per value (pure): for the compiled tail sweep
(kernels._tail_bin), each slot of |dh| (its float64 exponent and 12 leading mantissa bits,
from 2 m up) holds the first tail bin a value in it can have, and each tail bin its exact lower
edge: the smallest float64 that bins.bin_index puts in it. A value's bin is then its slot's
first bin plus the edges at or below it (at most three), the same bin bin_index gives. The
sweep reads both from one row per slot (slot_rows).
"""

from __future__ import annotations

from functools import lru_cache

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.stats import bins

_SLOT_EXPONENTS = 14  # slots cover 2 m <= |dh| < 2^15 m
_SLOT_BITS = 12  # leading mantissa bits of a slot: 2.4e-4 relative, about 2.4 tail bins
_SEARCH_ULPS = (6, 64)


@lru_cache(maxsize=1)
def tail_table() -> tuple[NDArray[np.int32], NDArray[np.float64]]:
    """For the compiled tail binning: the tail bin j (bin - _K of a positive value) of each
    slot's lowest value, and each bin's exact lower edge in |dh| (then +inf): the smallest
    float64 that bins.bin_index puts in it, found among the floats next to 2 exp(j r)."""
    top = np.array([2.0 ** (1 + _SLOT_EXPONENTS)])
    n_bins = int(_tail_j(top)[0]) + 2
    j = np.arange(n_bins)
    near = (bins.LINEAR_LIMIT_M * np.exp(j * bins.LOG_RATIO)).view(np.int64)
    edges = np.full(n_bins + 3, np.inf)  # + inf after the last: j + 3 stays inside
    todo = j
    for ulps in _SEARCH_ULPS:  # most edges lie within a few floats of 2 exp(j r)
        candidates = (near[todo, None] + np.arange(-ulps, ulps + 1)).view(np.float64)
        reached = _tail_j(candidates) >= todo[:, None]
        found = reached[:, -1] & ~reached[:, 0] & (np.diff(reached, axis=1) >= 0).all(axis=1)
        edges[todo[found]] = candidates[found, reached[found].argmax(axis=1)]
        todo = todo[~found]
    if todo.size:
        raise RuntimeError("tail bin edges are not where expected")  # pragma: no cover
    slots = np.arange(_SLOT_EXPONENTS << _SLOT_BITS, dtype=np.int64)
    lowest = ((slots + (0x4000000000000000 >> 40)) << 40).view(np.float64)
    return _tail_j(lowest).astype(np.int32), edges


@lru_cache(maxsize=1)
def slot_rows() -> NDArray[np.float64]:
    """tail_table laid out for the sweep: per slot one row (its first bin j, the edges of bins
    j + 1, j + 2 and j + 3), so that a value's bin takes one lookup where the two tables took
    two in turn (the same bins; a loop over tail values alone 10-20 % faster, the whole key
    sweep of a tail-heavy tile 1.5-4 %, issue 13). j is exact as a float64."""
    first, edges = tail_table()
    return np.column_stack([first, edges[first + 1], edges[first + 2], edges[first + 3]])


def _tail_j(a: NDArray[np.float64]) -> NDArray[np.int64]:
    """floor(log(a / 2 m) / log ratio) for a >= 2 m, as bins.bin_index computes it."""
    with np.errstate(divide="ignore", invalid="ignore"):
        q = np.floor(np.log(a / bins.LINEAR_LIMIT_M) / bins.LOG_RATIO)
    return np.where(np.isfinite(q), q, -1).astype(np.int64)
