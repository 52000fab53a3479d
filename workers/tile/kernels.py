"""Compiled loops for the per-tile pass (numba): one sweep over the pixels instead of one numpy
pass per operation. Pure; every kernel has a numpy twin in the module that calls it, and the tests
hold both to the same results (tests/workers/test_tile_pass.py, tests/workers/test_terrain.py).

``AVAILABLE`` is False when numba is not installed: the callers then take the numpy path.
Compiled code is cached on disk beside the module (``cache=True``), so a worker process compiles
once per installation, not once per start.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

# re-exported: callers ask kernels.AVAILABLE (numba itself is imported at the first sweep)
from demaudit.workers.compiled import AVAILABLE as AVAILABLE

_COMPILED: dict[str, Any] = {}

AMBIGUOUS = 255  # band code of a pixel whose slope lies within the margin of a band edge


def _compiled(name: str) -> Any:
    """The numba-compiled version of the loop ``_<name>`` (compiled, or loaded from the disk
    cache, once per process)."""
    if name not in _COMPILED:
        from numba import njit

        for needed in _CALLS.get(name, ()):  # loops called from this one, bound before compiling
            globals()[f"{needed}_compiled"] = _compiled(needed)
        loop = globals()[f"_{name}"]
        try:
            _COMPILED[name] = njit(cache=True, nogil=True)(loop)
        except RuntimeError:  # no writable cache folder (read-only install): compile per process
            _COMPILED[name] = njit(cache=False, nogil=True)(loop)
    return _COMPILED[name]


_CALLS = {
    "block_sweep": ("pairwise_sum",),
    "band_sweep": ("row_squared_gradient",),
    "key_sweep": ("tail_bin",),
}
pairwise_sum_compiled: Any = None  # set by _compiled("block_sweep")
row_squared_gradient_compiled: Any = None  # set by _compiled("band_sweep")
tail_bin_compiled: Any = None  # set by _compiled("key_sweep")


def _cell_sweep(x, key, linear_width, linear_limit, k_limit, dense, sums, mins, maxs, tail):  # type: ignore[no-untyped-def]
    """Per value (NaN, infinite and negative-cell values skipped): add it to its cell's sum and
    extremes; count it in its linear bin (floor(x / linear_width), as bins.bin_index) or list
    it in ``tail``. Returns how many values went to the tail."""
    n_tail = 0
    columns = 2 * k_limit
    for i in range(x.size):
        v = x[i]
        c = key[i]
        if c < 0 or not math.isfinite(v):
            continue
        sums[c] += v
        if v < mins[c]:
            mins[c] = v
        if v > maxs[c]:
            maxs[c] = v
        column = -1
        if abs(v) < linear_limit:
            column = int(math.floor(v / linear_width)) + k_limit
        if 0 <= column < columns:
            dense[c, column] += 1
        else:
            tail[n_tail] = i
            n_tail += 1
    return n_tail


def _key_sweep(  # type: ignore[no-untyped-def]
    dh, bits, bands, codes, patterns, base, sizes, binning, rows, counters, keys, listed,
    unsure, out,
):  # fmt: skip
    """One sweep: each pixel's key (pattern * n_cells + class code * n_band_codes + band +
    base; ``codes`` / ``patterns`` None: 0, each compiled apart so the pixel loop carries no
    test for them; sizes = (n_band_codes, n_cells)); key -1 for class code 255 (excluded) and
    non-finite dh), its cell's sum and extremes, and its bin: the linear bins (floor(v / width),
    as bins.bin_index) on dense counters, tail bins by _tail_bin (``bits`` is dh as int64).
    counters = (dense, sums, mins, maxs, tails); listed = (cell, bin) of tail values beyond the
    dense tail counters; ``unsure`` the indices of values _tail_bin cannot place (binned by the
    caller). out = (listed, unsure, finite excluded)."""
    dense, sums, mins, maxs, tails = counters
    linear_width, linear_limit, k_limit = binning[0], binning[1], int(binning[2])
    n_band_codes, n_cells = sizes[0], sizes[1]
    half = tails.shape[1] // 2
    n_listed, n_unsure, dropped = 0, 0, 0
    # the current cell's sum and extremes live in locals while neighbouring pixels share the
    # cell (the same additions in the same order as sums[c] += v, without a store per pixel)
    cell, total, low, high = -1, 0.0, 0.0, 0.0
    for i in range(dh.size):
        v = dh[i]
        code = 0 if codes is None else codes[i]
        finite = math.isfinite(v)
        if code == 255 or not finite:
            keys[i] = -1
            if finite:
                dropped += 1
            continue
        c = code * n_band_codes + bands[i] + base
        if patterns is not None:
            c += patterns[i] * n_cells
        keys[i] = c
        if c != cell:
            if cell >= 0:
                sums[cell], mins[cell], maxs[cell] = total, low, high
            cell, total, low, high = c, sums[c], mins[c], maxs[c]
        total += v
        if v < low:
            low = v
        if v > high:
            high = v
        if abs(v) < linear_limit:
            column = int(math.floor(v / linear_width)) + k_limit
            if 0 <= column < 2 * k_limit:
                dense[c, column] += 1
                continue
        j = tail_bin_compiled(v, bits[i], linear_limit, rows)
        if j < 0:
            unsure[n_unsure] = i
            n_unsure += 1
        elif j < half:
            tails[c, j if v > 0 else half + j] += 1
        else:
            listed[0][n_listed] = c
            listed[1][n_listed] = k_limit + j if v > 0 else -k_limit - 1 - j
            n_listed += 1
    if cell >= 0:
        sums[cell], mins[cell], maxs[cell] = total, low, high
    out[0], out[1], out[2] = n_listed, n_unsure, dropped


def _tail_bin(v, bits, linear_limit, rows):  # type: ignore[no-untyped-def]
    """The tail bin j of v (bin k_limit + j when v > 0, -k_limit - 1 - j below), or -1 when v
    lies below the linear limit or beyond the slots (the caller bins it as bins.bin_index):
    v's slot (exponent and 12 leading mantissa bits of ``bits``, v as int64) is its row of
    ``rows`` (tail_bins.slot_rows): its first possible bin, then the exact lower edges of the
    next three, those at or below |v| added."""
    a = abs(v)
    slot = ((bits & 0x7FFFFFFFFFFFFFFF) >> 40) - (0x4000000000000000 >> 40)  # the slot of 2.0
    if a < linear_limit or slot >= rows.shape[0]:
        return -1
    row = rows[slot]
    return int(row[0]) + (a >= row[1]) + (a >= row[2]) + (a >= row[3])


def _deviation_sweep(x, key, mean, residual, squares):  # type: ignore[no-untyped-def]
    """Per cell: the sum of deviations from mean and of their squares (same values skipped).
    The current cell's sums live in locals while neighbouring values share it (the same
    additions in the same order)."""
    cell, centre, r, q = -1, 0.0, 0.0, 0.0
    for i in range(x.size):
        c = key[i]
        if c < 0 or not math.isfinite(x[i]):
            continue
        if c != cell:
            if cell >= 0:
                residual[cell], squares[cell] = r, q
            cell, centre, r, q = c, mean[c], residual[c], squares[c]
        d = x[i] - centre
        r += d
        q += d * d
    if cell >= 0:
        residual[cell], squares[cell] = r, q


def _band_sweep(z, half_x, half_y, full_x, full_y, lower, upper, none, out):  # type: ignore[no-untyped-def]
    """Slope band per pixel from the squared gradient (central differences, one-sided at the
    edges) against squared thresholds ``lower`` < ``upper`` per edge; AMBIGUOUS where they
    disagree, ``none`` where the gradient is NaN or below the first edge.

    Row by row: the row's squared gradients first, then one compare-and-count pass per edge
    over the row (loops without branches, which the compiler turns into vector code)."""
    rows, cols = z.shape
    g2 = np.empty(cols)
    surely = np.empty(cols, dtype=np.uint8)
    maybe = np.empty(cols, dtype=np.uint8)
    for r in range(rows):
        r0 = r - 1 if r > 0 else 0
        r1 = r + 1 if r < rows - 1 else rows - 1
        sy = half_y if 0 < r < rows - 1 else full_y
        row_squared_gradient_compiled(z, r, r0, r1, sy, half_x, full_x, g2)
        surely[:] = 0
        maybe[:] = 0
        for e in range(upper.size):
            high = upper[e]
            low = lower[e]
            for c in range(cols):
                surely[c] += g2[c] >= high
                maybe[c] += g2[c] >= low
        for c in range(cols):
            s = surely[c]
            band = np.uint8(s - 1) if s > 0 else none
            out[r, c] = AMBIGUOUS if s != maybe[c] else band


def _row_squared_gradient(z, r, r0, r1, sy, half_x, full_x, g2):  # type: ignore[no-untyped-def]
    """Squared gradient of row r of z (rows r0 and r1 above and below; the first and last
    column one-sided) into g2, each value as (dz/dx)^2 + (dz/dy)^2 in float64."""
    cols = g2.size
    for c in range(cols):
        gy = (np.float64(z[r1, c]) - np.float64(z[r0, c])) * sy
        g2[c] = gy * gy
    for c in range(1, cols - 1):
        gx = (np.float64(z[r, c + 1]) - np.float64(z[r, c - 1])) * half_x
        g2[c] = gx * gx + g2[c]
    for c in (0, cols - 1):
        c0 = c - 1 if c > 0 else 0
        c1 = c + 1 if c < cols - 1 else cols - 1
        gx = (np.float64(z[r, c1]) - np.float64(z[r, c0])) * full_x
        gy = (np.float64(z[r1, c]) - np.float64(z[r0, c])) * sy
        g2[c] = gx * gx + gy * gy


def _pairwise_sum(a, n):  # type: ignore[no-untyped-def]
    """Sum of a[:n] in numpy's pairwise order for n <= 128 (one block of eight accumulators)."""
    if n < 8:
        res = 0.0
        for i in range(n):
            res += a[i]
        return res
    r0, r1, r2, r3, r4, r5, r6, r7 = a[0], a[1], a[2], a[3], a[4], a[5], a[6], a[7]
    i = 8
    while i < n - (n % 8):
        r0 += a[i]
        r1 += a[i + 1]
        r2 += a[i + 2]
        r3 += a[i + 3]
        r4 += a[i + 4]
        r5 += a[i + 5]
        r6 += a[i + 6]
        r7 += a[i + 7]
        i += 8
    res = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
    while i < n:
        res += a[i]
        i += 1
    return res


def _block_sweep(dh, factor, total, count, row):  # type: ignore[no-untyped-def]
    """Per factor x factor block: the sum of its finite values (as numpy's
    ``sum(axis=(1, 3))`` of the zero-padded blocks adds them: row by row, each row pairwise)
    and how many there are."""
    rows, cols = dh.shape
    blocks_down, blocks_across = total.shape
    for b in range(blocks_down):
        for i in range(factor):
            y = b * factor + i
            for c in range(blocks_across):
                for j in range(factor):
                    x = c * factor + j
                    v = 0.0
                    if y < rows and x < cols:
                        w = np.float64(dh[y, x])
                        if math.isfinite(w):
                            v = w
                            count[b, c] += 1
                    row[j] = v
                total[b, c] += pairwise_sum_compiled(row, factor)


def _other_within(x, lower, upper, value):  # type: ignore[no-untyped-def]
    """Whether any value of x (2-D, any strides) lies in [lower, upper] and differs from value
    (stops at the first)."""
    rows, cols = x.shape
    for r in range(rows):
        for c in range(cols):
            v = x[r, c]
            if lower <= v <= upper and v != value:
                return True
    return False


def _difference_sweep(test, reference, out):  # type: ignore[no-untyped-def]
    """out = test - reference in float64 (2-D, one shape; either may be float32): the same
    values as numpy's subtract with dtype float64, without its buffered casting."""
    rows, cols = test.shape
    for r in range(rows):
        for c in range(cols):
            out[r, c] = np.float64(test[r, c]) - np.float64(reference[r, c])


def difference_sweep(*args: Any) -> None:
    """Compiled _difference_sweep (same arguments)."""
    _compiled("difference_sweep")(*args)


def other_within(x: Any, lower: float, upper: float, value: float) -> bool:
    """Compiled _other_within (same arguments)."""
    return bool(_compiled("other_within")(x, lower, upper, value))


def cell_sweep(*args: Any) -> int:
    """Compiled _cell_sweep (same arguments)."""
    return int(_compiled("cell_sweep")(*args))


def key_sweep(*args: Any) -> None:
    """Compiled _key_sweep (same arguments)."""
    _compiled("key_sweep")(*args)


def deviation_sweep(*args: Any) -> None:
    """Compiled _deviation_sweep (same arguments)."""
    _compiled("deviation_sweep")(*args)


def band_sweep(*args: Any) -> None:
    """Compiled _band_sweep (same arguments)."""
    _compiled("band_sweep")(*args)


def block_sweep(*args: Any) -> None:
    """Compiled _block_sweep (same arguments)."""
    _compiled("block_sweep")(*args)
