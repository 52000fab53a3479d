"""A histogram's compact form for the trip between processes (pure).

Every tile result carries a dozen sparse histograms of some 10^4 to 10^5 bins each, pickled on
the worker and unpickled by the client: as int32 bins and counts that is about 1.5 MB a tile.
The bins are sorted and mostly neighbours, and most counts are small, so the packed form keeps
the first bin, the steps between bins and the counts each as one byte, with the few that do not
fit (255 and more) listed beside them: a quarter of the bytes or less (0.39 instead of 1.55 MB
for a tile of the benchmark's same-grid archive). Unpacking gives back the same values in the
same dtypes. Arrays the packing is not made for (negative or huge counts, not integers, not 1-D,
bins beyond +-2^62) travel as they are, and so do bins that are not strictly increasing as far as
their int64 steps show (steps that wrap round may look increasing: unpacking wraps the same way,
so the values come back exactly either way).

Both directions run as compiled loops when numba is there (workers/stats/kernels.py: one pass
each, unpacking straight into the arrays' own dtypes; 1.5-2x faster than numpy's casts and
masks for a tile's histograms), as numpy otherwise; the two make the same packed form
(tests/workers/stats/test_packing.py), so worker and client may each take either.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.compiled import AVAILABLE
from demaudit.workers.stats.kernels import escaped_bytes, listed_values, running_sum, unescaped

#: One byte a value; this byte says "the next of the values listed beside".
_ESCAPE = 255

#: Values as bytes: (bytes, the values of the escaped bytes in order, in the first of _LISTED
#: that holds them).
Bytes = tuple[NDArray[np.uint8], NDArray[np.unsignedinteger]]
_LISTED = (np.uint16, np.uint32, np.uint64)

#: The packed form: (first bin, steps, counts, bins' dtype, counts' dtype), or the arrays as they
#: are: (None, bins, counts).
Packed = tuple[int, Bytes, Bytes, str, str] | tuple[None, NDArray[Any], NDArray[Any]]


def pack(bins: NDArray[np.integer], counts: NDArray[np.integer]) -> Packed:
    """The packed form of a sparse histogram (sorted bin indices and their counts)."""
    if not _packable(bins, counts):
        return None, bins, counts
    wide = bins.astype(np.int64, copy=False)
    steps = wide[1:] - wide[:-1]
    if steps.size and int(steps.min()) < 1:  # not strictly increasing
        return None, bins, counts
    return int(bins[0]), _as_bytes(steps), _as_bytes(counts), bins.dtype.str, counts.dtype.str


def unpack(packed: Packed) -> tuple[NDArray[np.integer], NDArray[np.integer]]:
    """The bins and counts that :func:`pack` packed (the same values and dtypes)."""
    if packed[0] is None:
        return packed[1], packed[2]
    first, steps, counts, bins_dtype, counts_dtype = packed
    if AVAILABLE and np.dtype(bins_dtype).isnative and np.dtype(counts_dtype).isnative:
        # one pass each, straight into the arrays' own dtypes
        bins = np.empty(steps[0].size + 1, dtype=np.dtype(bins_dtype))
        running_sum(first, *steps, _ESCAPE, bins)
        values = np.empty(counts[0].size, dtype=np.dtype(counts_dtype))
        unescaped(*counts, _ESCAPE, values)
        return bins, values
    wide = np.empty(steps[0].size + 1, dtype=np.int64)
    wide[0] = first
    wide[1:] = _from_bytes(steps)
    np.cumsum(wide, out=wide)
    return wide.astype(np.dtype(bins_dtype), copy=False), _from_bytes(counts).astype(
        np.dtype(counts_dtype)
    )


def _packable(bins: NDArray[Any], counts: NDArray[Any]) -> bool:
    """Whether bins and counts are non-empty 1-D integer arrays of one size, the bins' ends
    within +-2^62 (their steps fit int64) and no count negative or beyond int64."""
    for values in (bins, counts):
        if values.ndim != 1 or values.size == 0 or not np.issubdtype(values.dtype, np.integer):
            return False
    if bins.size != counts.size or max(abs(int(bins[0])), abs(int(bins[-1]))) >= 2**62:
        return False
    return int(counts.min()) >= 0 and int(counts.max()) < 2**63


def _as_bytes(values: NDArray[np.integer]) -> Bytes:
    """Values (none negative) as one byte each, those of _ESCAPE or more listed beside."""
    if AVAILABLE and values.dtype.isnative:  # numba takes native byte order only
        small = np.empty(values.size, dtype=np.uint8)
        escaped = escaped_bytes(values, _ESCAPE, small)
        top = int(values.max()) if escaped else 0
        width = next(t for t in _LISTED if top <= np.iinfo(t).max)
        beside: NDArray[np.unsignedinteger] = np.empty(escaped, dtype=width)
        if escaped:
            listed_values(values, _ESCAPE, beside)
        return small, beside
    wide = values >= _ESCAPE
    small = values.astype(np.uint8)  # the wide ones wrap; overwritten next
    small[wide] = _ESCAPE
    listed = values[wide]
    top = int(listed.max()) if listed.size else 0
    return small, listed.astype(next(t for t in _LISTED if top <= np.iinfo(t).max))


def _from_bytes(packed: Bytes) -> NDArray[np.int64]:
    """The values _as_bytes packed, as int64."""
    small, listed = packed
    values = small.astype(np.int64)
    escaped = small == _ESCAPE
    if int(np.count_nonzero(escaped)) != listed.size:  # numpy would broadcast one value
        raise ValueError("packed values: the escaped bytes and the listed values disagree")
    values[escaped] = listed
    return values
