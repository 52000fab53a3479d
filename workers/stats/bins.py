"""The fixed bins of the dh histograms: the same for every tile, so histograms merge by adding
counts.

Width ``LINEAR_WIDTH_M`` (0.2 mm) for |dh| < ``LINEAR_LIMIT_M`` (2 m); beyond that, geometric
bins whose width is ``RELATIVE_WIDTH`` (0.01 %) of their distance from zero, so a blunder of 50 m
lands in a 5 mm bin. A histogram is sparse: the sorted indices of its non-empty bins and their
counts. Units: metres.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.compiled import AVAILABLE
from demaudit.workers.stats.kernels import add_within, nonzero_entries

LINEAR_WIDTH_M = 2.0e-4
LINEAR_LIMIT_M = 2.0
RELATIVE_WIDTH = 1.0e-4
K_LIMIT = round(LINEAR_LIMIT_M / LINEAR_WIDTH_M)  # index of the first geometric bin
LOG_RATIO = float(np.log1p(RELATIVE_WIDTH))  # log of a geometric bin's upper / lower edge


def bin_index(x: NDArray[np.float64]) -> NDArray[np.int64]:
    """Index of the bin holding each value (finite values only).

    Linear bins: floor(x / LINEAR_WIDTH_M) for |x| < LINEAR_LIMIT_M; the few values beyond
    (the tails) are binned on their own, geometrically.
    """
    x = np.asarray(x, dtype=np.float64)
    (tail,) = np.nonzero((np.abs(x) >= LINEAR_LIMIT_M).ravel())
    q = x / LINEAR_WIDTH_M
    flat_q = q.reshape(-1)
    flat_q[tail] = 0.0  # decided below; keeps huge values out of the integer cast
    k = np.floor(q, out=q).astype(np.int64)
    if tail.size:
        t = x.reshape(-1)[tail]
        pos = t >= LINEAR_LIMIT_M
        t_k = np.empty(t.shape, dtype=np.int64)
        t_k[pos] = K_LIMIT + np.floor(np.log(t[pos] / LINEAR_LIMIT_M) / LOG_RATIO)
        neg = ~pos
        t_k[neg] = -K_LIMIT - 1 - np.floor(np.log(-t[neg] / LINEAR_LIMIT_M) / LOG_RATIO)
        k.reshape(-1)[tail] = t_k
    return k


def bin_edges(k: NDArray[np.integer]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Lower and upper edge of each bin index."""
    k = np.asarray(k, dtype=np.int64)
    lo = k * LINEAR_WIDTH_M
    hi = (k + 1) * LINEAR_WIDTH_M
    pos = k >= K_LIMIT
    j = (k[pos] - K_LIMIT).astype(np.float64)
    lo[pos] = LINEAR_LIMIT_M * np.exp(j * LOG_RATIO)
    hi[pos] = LINEAR_LIMIT_M * np.exp((j + 1) * LOG_RATIO)
    neg = k < -K_LIMIT
    j = (-K_LIMIT - 1 - k[neg]).astype(np.float64)
    lo[neg] = -LINEAR_LIMIT_M * np.exp((j + 1) * LOG_RATIO)
    hi[neg] = -LINEAR_LIMIT_M * np.exp(j * LOG_RATIO)
    return lo.astype(np.float64), hi.astype(np.float64)


def sparse_histogram(x: NDArray[np.float64]) -> tuple[NDArray[np.int32], NDArray[np.integer]]:
    """Sparse histogram: sorted bin indices (int32) and counts (int32 while they fit: a tile's
    summaries travel from the workers, so they are kept compact; merges widen to int64)."""
    column = bin_index(x) + K_LIMIT
    outside = column.view(np.uint64) >= 2 * K_LIMIT  # negative columns wrap to huge
    (tail,) = np.nonzero(outside)
    tail_bins, tail_counts = np.unique(column[tail] - K_LIMIT, return_counts=True)
    column[tail] = 2 * K_LIMIT  # one extra counter for the tails, dropped below
    dense = np.bincount(column, minlength=2 * K_LIMIT + 1)[:-1]
    (nonzero,) = np.nonzero(dense)
    bins = np.concatenate([nonzero - K_LIMIT, tail_bins]).astype(np.int32)
    counts = np.concatenate([dense[nonzero], tail_counts])
    counts = counts.astype(np.int32 if x.size < 2**31 else np.int64)
    order = np.argsort(bins, kind="stable")
    return bins[order], counts[order]


def added_histograms(
    bins: NDArray[np.int64], counts: NDArray[np.int64]
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """Sorted distinct bins and their summed counts. Large inputs (a batch of tile histograms)
    are added on one dense counter over their span instead of sorting (over a span too wide
    for it, the linear bins on one and the tail bins by sorting); the result is the same."""
    if bins.size < _DENSE_ADD_FROM or _span(bins) <= _DENSE_SPAN:
        return _sorted_sums(bins, counts)
    column = bins + K_LIMIT
    tail = column.view(np.uint64) >= 2 * K_LIMIT  # negative columns wrap to huge
    linear = ~tail
    dense = np.bincount(column[linear], weights=counts[linear], minlength=2 * K_LIMIT)
    (nonzero,) = np.nonzero(dense)
    tail_bins, tail_counts = _sorted_sums(bins[tail], counts[tail])
    low = np.searchsorted(tail_bins, 0)  # tails below the linear bins, then above
    return (
        np.concatenate([tail_bins[:low], nonzero - K_LIMIT, tail_bins[low:]]).astype(np.int64),
        np.concatenate([tail_counts[:low], dense[nonzero].astype(np.int64), tail_counts[low:]]),
    )


def added_parts(
    parts: Sequence[tuple[NDArray[np.integer], NDArray[np.integer]]],
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """added_histograms of several sparse histograms (bins, counts), without concatenating
    them: when each one's bins rise strictly (as every histogram here does) and together they
    span few enough bins, each is added into one dense counter in turn (about twice as fast
    for a merge batch of 33 tile histograms); otherwise as added_histograms. The same result."""
    present = [(b, c) for b, c in parts if b.size]
    entries = sum(b.size for b, _ in present)
    if entries >= _DENSE_ADD_FROM:
        low = min(int(b[0]) for b, _ in present)
        span = max(int(b[-1]) for b, _ in present) - low + 1
        if 0 < span <= _DENSE_SPAN:
            dense = np.zeros(span, dtype=np.int64)
            if AVAILABLE:  # bounds checked while adding: parts in any order are refused
                if all(add_within(dense, b, c, low) for b, c in present):
                    return dense_entries(dense, low)
            elif all(b.size < 2 or bool((np.diff(b) > 0).all()) for b, _ in present):
                for b, c in present:
                    dense[b - low] += c  # bins distinct within one histogram: no index repeats
                return dense_entries(dense, low)
    if not present:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    return added_histograms(
        np.concatenate([b for b, _ in present], dtype=np.int64),
        np.concatenate([c for _, c in present], dtype=np.int64),
    )


def dense_entries(
    dense: NDArray[np.integer], low: int
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """The nonzero counters of a dense histogram (1-D, counter i for bin low + i) as a sparse
    one: bins ascending and counts, both int64 (compiled when numba is there)."""
    if AVAILABLE:
        return nonzero_entries(dense, low)  # type: ignore[no-any-return]
    (nonzero,) = np.nonzero(dense)
    return (nonzero + low).astype(np.int64), dense[nonzero].astype(np.int64)


def _sorted_sums(
    bins: NDArray[np.int64], counts: NDArray[np.int64]
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    if bins.size == 0:
        return bins.astype(np.int64), counts.astype(np.int64)
    span = _span(bins) if bins.size >= _DENSE_ADD_FROM else _DENSE_SPAN + 1
    if span <= _DENSE_SPAN:  # one dense counter
        low = int(bins.min())
        if AVAILABLE:  # compiled: an exact int64 counter, no float weights
            dense = np.zeros(span, dtype=np.int64)
            if add_within(dense, bins, counts, low):  # always: low and span are the bins' own
                return dense_entries(dense, low)
        summed = np.bincount(bins - low, weights=counts, minlength=span)
        (present,) = np.nonzero(summed)
        return (present + low).astype(np.int64), summed[present].astype(np.int64)
    order = np.argsort(bins, kind="stable")
    sorted_bins = bins[order]
    starts = np.flatnonzero(np.r_[True, sorted_bins[1:] != sorted_bins[:-1]])
    summed = np.add.reduceat(counts[order], starts)
    return sorted_bins[starts].astype(np.int64), summed.astype(np.int64)


def _span(bins: NDArray[np.int64]) -> int:
    """How many bins from the lowest to the highest of bins (not empty)."""
    return int(bins.max()) - int(bins.min()) + 1


_DENSE_ADD_FROM = 4096  # entries; below this one sort is cheaper than the dense counter
_DENSE_SPAN = 4_000_000  # most counters of a dense add (bincount's weights are float64: exact)
