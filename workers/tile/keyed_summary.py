"""Many dh summaries from one pass: every value carries a small integer key (its cell), and any
union of cells is summarised without touching the values again (pure).

A tile's summaries (whole tile, each region, each region x stratum) are unions of cells of
(region membership x land-cover class x slope band). :func:`summarise_cells` bins each value once
and counts (cell, bin) pairs with one bincount; moments per cell come from bincounts with weights
(two passes, so the sum of squared deviations does not cancel); extremes from ``minimum.at``.
:meth:`CellSummaries.union` then adds the cells' histograms and merges their moments. The result
is the :class:`~demaudit.workers.stats.summary.DhSummary` that ``summarise`` gives on the same
values: the same
bins and counts (the same dtypes) and extremes, the moments equal to rounding (about 1e-13
relative).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.stats import bins
from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.stats.bins import dense_entries
from demaudit.workers.stats.summary import DhSummary
from demaudit.workers.tile import kernels
from demaudit.workers.tile.tail_bins import slot_rows

_K = bins.K_LIMIT  # linear bins are -_K .. _K - 1
_WIDTH = 2 * _K + 1  # one column per linear bin, plus one (the last) for values in the tails
#: Most (cell, bin) counters held at once (int64): larger tiles' cells are counted in groups.
MAX_COUNTERS = 4_000_000


@dataclass(frozen=True, eq=False)
class CellSummaries:
    """Per cell: count, mean, m2, extremes and the sparse histogram (linear bins and tails)."""

    count: NDArray[np.int64]
    mean: NDArray[np.float64]
    m2: NDArray[np.float64]
    minimum: NDArray[np.float64]
    maximum: NDArray[np.float64]
    linear: tuple[NDArray[np.int64], ...]  # per cell, the counts of the linear bins (dense)
    tails: tuple[tuple[NDArray[np.int64], NDArray[np.int64]], ...]  # (bin, count) per cell

    def union(self, cells: Iterable[int]) -> DhSummary:
        """The summary of the values of all the given cells together."""
        chosen = [c for c in cells if self.count[c]]
        if not chosen:
            return dh_summary.empty()
        idx = np.asarray(chosen, dtype=np.intp)
        n = self.count[idx]
        total = int(n.sum())
        mean = float((self.mean[idx] * n).sum() / total)
        delta = self.mean[idx] - mean
        m2 = float(self.m2[idx].sum() + (n * delta * delta).sum())
        bins, counts = self._histogram(chosen)
        counts = counts.astype(np.int32 if total < 2**31 else np.int64)
        return DhSummary(
            total,
            mean,
            m2,
            float(self.minimum[idx].min()),
            float(self.maximum[idx].max()),
            bins,
            counts,
        )

    def grouped(self, groups: Sequence[Iterable[int]]) -> CellSummaries:
        """Summaries per group of cells: cell j of the result is the union of groups[j]
        (so that unions over many groups add each group's histograms once)."""
        parts = [[c for c in group if self.count[c]] for group in groups]
        count = np.array([int(self.count[p].sum()) for p in parts], dtype=np.int64)
        mean, m2 = np.zeros(len(parts)), np.zeros(len(parts))
        minimum, maximum = np.full(len(parts), np.inf), np.full(len(parts), -np.inf)
        linear, tails = [], []
        for j, p in enumerate(parts):
            if p:
                n = self.count[p]
                mean[j] = (self.mean[p] * n).sum() / count[j]
                delta = self.mean[p] - mean[j]
                m2[j] = self.m2[p].sum() + (n * delta * delta).sum()
                minimum[j], maximum[j] = self.minimum[p].min(), self.maximum[p].max()
            linear.append(self._linear(p))
            tails.append(self._tails(p))
        return CellSummaries(count, mean, m2, minimum, maximum, tuple(linear), tuple(tails))

    def _linear(self, cells: list[int]) -> NDArray[np.int64]:
        if not cells:
            return np.zeros(_WIDTH - 1, dtype=np.int64)
        dense = self.linear[cells[0]]
        if len(cells) > 1:
            dense = dense.copy()
            for c in cells[1:]:
                dense += self.linear[c]
        return dense

    def _tails(self, cells: list[int]) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
        if not cells:
            return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
        tail_bins = np.concatenate([self.tails[c][0] for c in cells])
        tail_counts = np.concatenate([self.tails[c][1] for c in cells])
        if len(cells) > 1 and tail_bins.size:
            return bins.added_histograms(tail_bins, tail_counts)
        return tail_bins.astype(np.int64), tail_counts.astype(np.int64)

    def _histogram(self, cells: list[int]) -> tuple[NDArray[np.int32], NDArray[np.int64]]:
        linear_bins, linear_counts = dense_entries(self._linear(cells), -_K)
        tail_bins, tail_counts = self._tails(cells)
        below = int(np.searchsorted(tail_bins, 0))  # tail bins lie below or above the linear ones
        bins = np.concatenate([tail_bins[:below], linear_bins, tail_bins[below:]])
        counts = np.concatenate([tail_counts[:below], linear_counts, tail_counts[below:]])
        return bins.astype(np.int32), counts.astype(np.int64)


def summarise_cells(
    values: NDArray[np.floating], cells: NDArray[np.integer], n_cells: int
) -> CellSummaries:
    """Summaries of values (1-D, metres) per cell (1-D, same length, 0..n_cells-1).

    NaN and infinite values, and values whose cell is negative, are left out.
    """
    x = np.asarray(values, dtype=np.float64)
    key = np.asarray(cells)
    if x.shape != key.shape or x.ndim != 1:
        raise ValueError(f"values {x.shape} and cells {key.shape} must be 1-D of one length")
    if kernels.AVAILABLE and n_cells * _WIDTH <= MAX_COUNTERS:
        return _summarise_compiled(x, key, n_cells)
    keep = np.isfinite(x) & (key >= 0)
    if not keep.all():
        x, key = x[keep], key[keep]
    key = key.astype(np.intp, copy=False)
    count = np.bincount(key, minlength=n_cells)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.bincount(key, weights=x, minlength=n_cells) / count
        deviation = x - mean[key]
        residual = np.bincount(key, weights=deviation, minlength=n_cells)
        np.multiply(deviation, deviation, out=deviation)
        squares = np.bincount(key, weights=deviation, minlength=n_cells)
        correction = np.where(count > 0, residual / count, 0.0)
        mean += correction  # the residual of the first estimate, as in a second pass
        m2 = np.maximum(squares - residual * correction, 0.0)
    del deviation
    minimum = np.full(n_cells, np.inf)
    maximum = np.full(n_cells, -np.inf)
    np.minimum.at(minimum, key, x)
    np.maximum.at(maximum, key, x)
    linear, tails = _cell_histograms(x, key, n_cells)
    return CellSummaries(count, np.nan_to_num(mean), m2, minimum, maximum, linear, tails)


def _cell_histograms(
    x: NDArray[np.float64], key: NDArray[np.intp], n_cells: int
) -> tuple[tuple[NDArray[np.int64], ...], tuple[tuple[NDArray[np.int64], NDArray[np.int64]], ...]]:
    """Per cell, the counts of the linear bins (dense, column = bin + _K) and the tail bins."""
    k = bins.bin_index(x)
    column = k + _K
    in_tail = column.view(np.uint64) >= _WIDTH - 1  # negative columns wrap to huge
    (tail,) = np.nonzero(in_tail)
    column[tail] = _WIDTH - 1
    linear: list[NDArray[np.int64]] = []
    group = max(1, MAX_COUNTERS // _WIDTH)
    for first in range(0, n_cells, group):
        last = min(first + group, n_cells)
        if first == 0 and last == n_cells:
            code = key * _WIDTH
            code += column
        else:
            inside = (key >= first) & (key < last)
            code = (key[inside] - first) * _WIDTH + column[inside]
        dense = np.bincount(code, minlength=(last - first) * _WIDTH).reshape(-1, _WIDTH)
        del code
        linear.extend(dense[:, :-1])
    return tuple(linear), _tail_runs(key[tail], k[tail], n_cells)


def _summarise_compiled(
    x: NDArray[np.float64], key: NDArray[np.intp], n_cells: int
) -> CellSummaries:
    """summarise_cells in two compiled sweeps (sums, extremes and linear bins; deviations)."""
    dense = np.zeros((n_cells, _WIDTH - 1), dtype=np.int64)
    sums = np.zeros(n_cells)
    minimum = np.full(n_cells, np.inf)
    maximum = np.full(n_cells, -np.inf)
    tail = np.empty(x.size, dtype=np.intp)
    n_tail = kernels.cell_sweep(
        x,
        key,
        bins.LINEAR_WIDTH_M,
        bins.LINEAR_LIMIT_M,
        _K,
        dense,
        sums,
        minimum,
        maximum,
        tail,
    )
    tail = tail[:n_tail]
    tail_key = key[tail].astype(np.intp)
    tail_bin = bins.bin_index(x[tail])
    return _finish(x, key, (dense, sums, minimum, maximum), tail_key, tail_bin)


def summarise_keyed(
    dh: NDArray[np.floating],
    *,
    bands: NDArray[np.uint8],
    codes: NDArray[np.uint8] | None,
    patterns: NDArray[np.int32] | int | None,
    n_band_codes: int,
    n_cells: int,
    n_patterns: int,
) -> tuple[CellSummaries, int] | None:
    """summarise_cells of dh (metres, NaN = none) with each pixel's cell made on the way, in
    compiled sweeps (keys and bins, tail bins included; deviations): cell = pattern * n_cells +
    class code * n_band_codes + band (``codes`` and ``patterns`` on dh's grid, None: all 0;
    ``patterns`` may also be a single value, every pixel's pattern).
    Pixels of class code 255 (excluded) are left out and counted (the int returned, finite dh
    only). None when the compiled loops are not available or the counters would not fit at once
    (the caller then builds the cells itself)."""
    total = n_patterns * n_cells
    if not kernels.AVAILABLE or total * _WIDTH > MAX_COUNTERS:
        return None
    x = np.ascontiguousarray(dh, dtype=np.float64).reshape(-1)
    width = min(TAIL_COLUMNS, MAX_TAIL_COUNTERS // (2 * total))
    counters = (
        np.zeros((total, _WIDTH - 1), dtype=np.int32 if x.size < 2**31 else np.int64),
        np.zeros(total),
        np.full(total, np.inf),
        np.full(total, -np.inf),
        np.zeros((total, 2 * width), dtype=np.int32),
    )
    key = np.empty(x.size, dtype=np.int32)
    listed = (np.empty(x.size, dtype=np.int32), np.empty(x.size, dtype=np.int64))
    unsure = np.empty(x.size, dtype=np.intp)
    found = np.zeros(3, dtype=np.int64)
    if patterns is None or isinstance(patterns, int):  # every pixel has the same pattern
        pattern_grid, base = None, (patterns or 0) * n_cells
    else:
        pattern_grid, base = _flat(patterns, np.int32), 0
    kernels.key_sweep(
        x, x.view(np.int64), _flat(bands, np.uint8),
        None if codes is None else _flat(codes, np.uint8), pattern_grid, base,
        np.array([n_band_codes, n_cells]), _BINNING, slot_rows(),
        counters, key, listed, unsure, found,
    )  # fmt: skip
    n_listed, n_unsure, dropped = (int(v) for v in found)
    keys_at, bins_at = listed[0][:n_listed].astype(np.intp), listed[1][:n_listed]
    if n_unsure:  # beyond the slots (or rounding at +-2 m): binned as bins.bin_index bins them
        at = unsure[:n_unsure]
        keys_at = np.concatenate([keys_at, key[at].astype(np.intp)])
        bins_at = np.concatenate([bins_at, bins.bin_index(x[at])])
    summaries = _finish(x, key, counters[:4], keys_at, bins_at, tail_counts=counters[4])
    return summaries, dropped


def _flat(values: NDArray[np.generic], dtype: type) -> NDArray[np.generic]:
    """values as a contiguous 1-D array of dtype."""
    return np.ascontiguousarray(values, dtype=dtype).reshape(-1)


_BINNING = np.array([bins.LINEAR_WIDTH_M, bins.LINEAR_LIMIT_M, _K, bins.LOG_RATIO])
#: Tail bins counted on dense counters per cell and sign (the first this many beyond +-2 m,
#: i.e. up to about 53 m), as long as all cells' counters stay within MAX_TAIL_COUNTERS.
TAIL_COLUMNS = 32_768
MAX_TAIL_COUNTERS = 2_000_000
#: The first sweep's counters: dense linear bins per cell, sums, minima, maxima.
Counters = tuple[NDArray[np.int64], NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]


def _finish(
    x: NDArray[np.float64],
    key: NDArray[np.integer],
    counters: Counters,
    tail_key: NDArray[np.intp],
    tail_bin: NDArray[np.int64],
    *,
    tail_counts: NDArray[np.int32] | None = None,
) -> CellSummaries:
    """The cells' summaries from the first sweep's counters (dense linear bins, sums, extremes)
    and tail entries: counts, then the deviations' sweep for the moments, then the tail runs."""
    dense, sums, minimum, maximum = counters
    n_cells = sums.size
    count = dense.sum(axis=1) + np.bincount(tail_key, minlength=n_cells)
    counted_tails = None if tail_counts is None else tail_counts.sum(axis=1)
    if counted_tails is not None:
        count += counted_tails
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(count > 0, sums / count, 0.0)
    residual = np.zeros(n_cells)
    squares = np.zeros(n_cells)
    kernels.deviation_sweep(x, key, mean, residual, squares)
    correction = np.where(count > 0, residual / np.maximum(count, 1), 0.0)
    mean += correction  # the residual of the first estimate, as in a second pass
    m2 = np.maximum(squares - residual * correction, 0.0)
    tails = _tail_runs(tail_key, tail_bin, n_cells)
    if tail_counts is not None and counted_tails is not None:
        tails = tuple(
            _with_dense_tails(t, row) if n else t  # a cell without dense tail counts: as listed
            for t, row, n in zip(tails, tail_counts, counted_tails.tolist(), strict=True)
        )
    return CellSummaries(count, mean, m2, minimum, maximum, tuple(dense), tails)


def _with_dense_tails(
    listed: tuple[NDArray[np.int64], NDArray[np.int64]], row: NDArray[np.int64]
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """A cell's tail runs (bins ascending) from its dense tail counters (columns j for bin
    _K + j, then width + j for bin -_K - 1 - j) and its listed runs."""
    width = row.size // 2
    # column width + j is bin -_K - 1 - j: reversed, column i of that half is bin i - _K - width
    below = dense_entries(row[width:][::-1], -_K - width)
    above = dense_entries(row[:width], _K)
    tail_bins = np.concatenate([below[0], listed[0], above[0]]).astype(np.int64)
    counts = np.concatenate([below[1], listed[1], above[1]]).astype(np.int64)
    if listed[0].size and (below[0].size or above[0].size):  # listed bins may be any: add, sort
        return bins.added_histograms(tail_bins, counts)
    return tail_bins, counts


def _tail_runs(
    tail_key: NDArray[np.intp], tail_bin: NDArray[np.int64], n_cells: int
) -> tuple[tuple[NDArray[np.int64], NDArray[np.int64]], ...]:
    """Per cell, the distinct tail bins of its values and how many fall in each (ascending).

    The (cell, bin) pairs are counted as one integer code: with one bincount when the bins span
    a range small enough to hold a counter per (cell, bin) (a tile's tails usually do), else by
    sorting the codes. Either way the runs come out ordered by cell, then bin.
    """
    if tail_key.size == 0:
        empty = np.zeros(0, dtype=np.int64)
        return tuple((empty, empty) for _ in range(n_cells))
    low = int(tail_bin.min())
    span = int(tail_bin.max()) - low + 1
    code = tail_key.astype(np.int64) * span
    code += tail_bin
    code -= low
    if n_cells * span <= MAX_COUNTERS:
        counted = np.bincount(code, minlength=n_cells * span)
        codes = np.flatnonzero(counted)
        run_counts = counted[codes].astype(np.int64)
    else:
        codes, run_counts = np.unique(code, return_counts=True)
        run_counts = run_counts.astype(np.int64)
    run_keys, run_bins = np.divmod(codes, span)
    run_bins += low
    bounds = np.searchsorted(run_keys, np.arange(n_cells + 1))
    return tuple(
        (run_bins[bounds[c] : bounds[c + 1]], run_counts[bounds[c] : bounds[c + 1]])
        for c in range(n_cells)
    )
