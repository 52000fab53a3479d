"""Mergeable summaries of dh: exact moments plus a fine histogram for the robust quantiles.

Median, NMAD and quantiles do not add up across tiles, so each tile (and each region or stratum
within it) is summarised by a small object that *does* merge: the count, mean and sum of squared
deviations (merged exactly with Chan's formula), the exact minimum and maximum, and a sparse
histogram of dh over fixed bins that are the same for every tile. Merging is adding counts, so it is
associative and commutative, and a merged summary equals the summary of all pixels at once.

The bins: width ``LINEAR_WIDTH_M`` (0.2 mm) for |dh| < ``LINEAR_LIMIT_M`` (2 m); beyond that,
geometric bins whose width is ``RELATIVE_WIDTH`` (0.01 %) of their distance from zero, so a
blunder of 50 m lands in a 5 mm bin. Only non-empty bins are stored (bin index, count).

Quantiles are read back as in ``numpy.quantile`` (linear interpolation between order statistics,
method 7); each order statistic is placed inside its bin as if the bin's pixels were spread evenly.
The true order statistic lies in the same bin, so the error is at most one bin width:

* median, q683_abs, q95_abs: within max(0.2 mm, 0.01 % of |value|);
* nmad: within 1.4826 x (0.2 mm + max(0.2 mm, 0.01 % x (|median| + MAD))).

Units are those of the values summarised (metres throughout demaudit). NaN and infinite values are
ignored by :func:`summarise`.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

LINEAR_WIDTH_M = 2.0e-4
LINEAR_LIMIT_M = 2.0
RELATIVE_WIDTH = 1.0e-4
NMAD_FACTOR = 1.4826  # 1 / Phi^-1(0.75), Höhle & Höhle (2009)
STAT_KEYS = ("count", "mean", "std", "rmse", "median", "nmad", "q683_abs", "q95_abs", "min", "max")

_K_LIMIT = round(LINEAR_LIMIT_M / LINEAR_WIDTH_M)  # index of the first geometric bin
_LOG_RATIO = float(np.log1p(RELATIVE_WIDTH))


@dataclass(frozen=True, eq=False)
class DhSummary:
    """Mergeable summary of a set of dh values (metres).

    ``m2`` is the sum of squared deviations from the mean; ``bins``/``counts`` the sorted indices
    and counts of the non-empty histogram bins.
    """

    count: int
    mean: float
    m2: float
    minimum: float
    maximum: float
    bins: NDArray[np.integer]
    counts: NDArray[np.integer]

    @property
    def nbytes(self) -> int:
        """Size of the histogram payload in bytes."""
        return int(self.bins.nbytes + self.counts.nbytes)


def empty() -> DhSummary:
    """The summary of no values: the identity of :func:`merge`."""
    none = np.zeros(0, dtype=np.int64)
    return DhSummary(0, 0.0, 0.0, np.inf, -np.inf, none, none.copy())


def summarise(values: ArrayLike) -> DhSummary:
    """Summarise dh values (any shape); NaN and infinite values are ignored."""
    x = np.asarray(values, dtype=np.float64).ravel()
    x = x[np.isfinite(x)]
    if x.size == 0:
        return empty()
    mean = float(x.mean())
    m2 = float(np.square(x - mean).sum())
    bins, counts = _histogram(x)
    return DhSummary(int(x.size), mean, m2, float(x.min()), float(x.max()), bins, counts)


def merge(a: DhSummary, b: DhSummary) -> DhSummary:
    """Merge two summaries; the result summarises the union of their values."""
    return merge_all((a, b))


def merge_all(summaries: Iterable[DhSummary]) -> DhSummary:
    """Merge any number of summaries at once (the empty summary when there are none).

    Moments merge with Chan's formula; histograms by one sort of all their bins, with integer
    counts added exactly.
    """
    parts = [s for s in summaries if s.count]
    if not parts:
        return empty()
    if len(parts) == 1:
        return parts[0]
    n, mean, m2 = 0, 0.0, 0.0
    for s in parts:
        total = n + s.count
        delta = s.mean - mean
        mean += delta * s.count / total
        m2 += s.m2 + delta * delta * n * s.count / total
        n = total
    all_bins = np.concatenate([s.bins for s in parts]).astype(np.int64)
    all_counts = np.concatenate([s.counts for s in parts]).astype(np.int64)
    order = np.argsort(all_bins, kind="stable")
    sorted_bins = all_bins[order]
    starts = np.flatnonzero(np.r_[True, sorted_bins[1:] != sorted_bins[:-1]])
    counts = np.add.reduceat(all_counts[order], starts)
    return DhSummary(
        n,
        float(mean),
        float(m2),
        min(s.minimum for s in parts),
        max(s.maximum for s in parts),
        sorted_bins[starts].astype(np.int64),
        counts.astype(np.int64),
    )


def subtract(total: DhSummary, part: DhSummary, *, minimum: float, maximum: float) -> DhSummary:
    """The summary of total's values without part's: undoes ``merge(rest, part)``.

    part must be contained in total (every bin of part holds no more in total), else ValueError.
    Histogram counts subtract exactly, and the moments by inverting Chan's formula. The minimum
    and maximum of what remains cannot be derived from the two summaries, so the caller passes
    them (the extremes of the remaining parts); they are ignored when nothing remains.
    """
    if part.count == 0:
        return total
    rest_n = total.count - part.count
    at = np.searchsorted(total.bins, part.bins)
    inside = at < total.bins.size
    found = np.zeros(part.bins.shape, dtype=bool)
    found[inside] = total.bins[at[inside]] == part.bins[inside]
    counts = total.counts.astype(np.int64)
    if rest_n < 0 or not found.all():
        raise ValueError("cannot subtract a summary that is not part of the total")
    np.subtract.at(counts, at, part.counts.astype(np.int64))
    if (counts < 0).any():
        raise ValueError("cannot subtract a summary that is not part of the total")
    if rest_n == 0:
        return empty()
    keep = counts > 0
    mean = total.mean + (total.mean - part.mean) * part.count / rest_n
    delta = part.mean - mean
    m2 = total.m2 - part.m2 - delta * delta * rest_n * part.count / total.count
    return DhSummary(
        rest_n,
        float(mean),
        max(float(m2), 0.0),
        float(minimum),
        float(maximum),
        total.bins[keep].astype(np.int64),
        counts[keep],
    )


def statistics(s: DhSummary) -> dict[str, float | int | None]:
    """The statistics of STAT_KEYS; all but count are None for an empty summary.

    std is the sample standard deviation (n - 1); rmse is sqrt(mean(dh^2)); nmad is
    1.4826 x median(|dh - median(dh)|); q683_abs and q95_abs are quantiles of |dh|.
    """
    if s.count == 0:
        return {key: (0 if key == "count" else None) for key in STAT_KEYS}
    median = float(quantile(s, 0.5))
    mad = float(abs_quantile(s, 0.5, center=median))
    abs_q = abs_quantile(s, np.array([0.683, 0.95]), center=0.0)
    std = float(np.sqrt(s.m2 / (s.count - 1))) if s.count > 1 else 0.0
    rmse = float(np.sqrt(s.mean**2 + s.m2 / s.count))
    return {
        "count": s.count,
        "mean": s.mean,
        "std": std,
        "rmse": rmse,
        "median": median,
        "nmad": NMAD_FACTOR * mad,
        "q683_abs": float(abs_q[0]),
        "q95_abs": float(abs_q[1]),
        "min": s.minimum,
        "max": s.maximum,
    }


def quantile(s: DhSummary, p: ArrayLike) -> NDArray[np.float64]:
    """Quantile(s) p of the summarised values, as numpy.quantile's default method."""
    return _interpolate_order_statistics(s, p, lambda ranks: order_statistics(s, ranks))


def abs_quantile(s: DhSummary, p: ArrayLike, *, center: float = 0.0) -> NDArray[np.float64]:
    """Quantile(s) p of |value - center|, as numpy.quantile's default method."""
    return _interpolate_order_statistics(s, p, lambda ranks: abs_order_statistics(s, ranks, center))


def quantile_bound_m(value: float) -> float:
    """The stated accuracy of a median or |dh| quantile read from a summary (metres)."""
    return max(LINEAR_WIDTH_M, RELATIVE_WIDTH * abs(value))


def nmad_bound_m(median: float, nmad: float) -> float:
    """The stated accuracy of an NMAD read from a summary (metres)."""
    mad = nmad / NMAD_FACTOR
    return NMAD_FACTOR * (LINEAR_WIDTH_M + quantile_bound_m(abs(median) + mad))


# -- bins ---------------------------------------------------------------------------------------


def bin_index(x: NDArray[np.float64]) -> NDArray[np.int64]:
    """Index of the bin holding each value (finite values only)."""
    k = np.empty(x.shape, dtype=np.int64)
    linear = np.abs(x) < LINEAR_LIMIT_M
    k[linear] = np.floor(x[linear] / LINEAR_WIDTH_M)
    pos = x >= LINEAR_LIMIT_M
    k[pos] = _K_LIMIT + np.floor(np.log(x[pos] / LINEAR_LIMIT_M) / _LOG_RATIO)
    neg = x <= -LINEAR_LIMIT_M
    k[neg] = -_K_LIMIT - 1 - np.floor(np.log(-x[neg] / LINEAR_LIMIT_M) / _LOG_RATIO)
    return k


def bin_edges(k: NDArray[np.integer]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Lower and upper edge of each bin index."""
    k = np.asarray(k, dtype=np.int64)
    lo = k * LINEAR_WIDTH_M
    hi = (k + 1) * LINEAR_WIDTH_M
    pos = k >= _K_LIMIT
    j = (k[pos] - _K_LIMIT).astype(np.float64)
    lo[pos] = LINEAR_LIMIT_M * np.exp(j * _LOG_RATIO)
    hi[pos] = LINEAR_LIMIT_M * np.exp((j + 1) * _LOG_RATIO)
    neg = k < -_K_LIMIT
    j = (-_K_LIMIT - 1 - k[neg]).astype(np.float64)
    lo[neg] = -LINEAR_LIMIT_M * np.exp((j + 1) * _LOG_RATIO)
    hi[neg] = -LINEAR_LIMIT_M * np.exp(j * _LOG_RATIO)
    return lo.astype(np.float64), hi.astype(np.float64)


def _histogram(x: NDArray[np.float64]) -> tuple[NDArray[np.int32], NDArray[np.integer]]:
    """Sparse histogram: sorted bin indices (int32) and counts (int32 while they fit: a tile's
    summaries travel from the workers, so they are kept compact; merges widen to int64)."""
    k = bin_index(x)
    linear = (k >= -_K_LIMIT) & (k < _K_LIMIT)
    dense = np.bincount(k[linear] + _K_LIMIT, minlength=2 * _K_LIMIT)
    (nonzero,) = np.nonzero(dense)
    tail_bins, tail_counts = np.unique(k[~linear], return_counts=True)
    bins = np.concatenate([nonzero - _K_LIMIT, tail_bins]).astype(np.int32)
    counts = np.concatenate([dense[nonzero], tail_counts])
    counts = counts.astype(np.int32 if x.size < 2**31 else np.int64)
    order = np.argsort(bins, kind="stable")
    return bins[order], counts[order]


# -- reading quantiles back ---------------------------------------------------------------------


def _interpolate_order_statistics(s, p, estimate):  # type: ignore[no-untyped-def]
    p_arr = np.atleast_1d(np.asarray(p, dtype=np.float64))
    if s.count == 0:
        return np.full(p_arr.shape, np.nan)
    h = (s.count - 1) * p_arr
    j = np.floor(h).astype(np.int64)
    frac = h - j
    j_next = np.minimum(j + 1, s.count - 1)
    ranks = np.concatenate([j, j_next])
    values = estimate(ranks)
    lower, upper = values[: j.size], values[j.size :]
    result = lower + frac * (upper - lower)
    return result.reshape(np.shape(p))


def _cdf_knots(s: DhSummary) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Knots of the piecewise-linear CDF that spreads each bin's count evenly across it."""
    lo, hi = bin_edges(s.bins)
    lo = np.clip(lo, s.minimum, s.maximum)
    hi = np.clip(hi, s.minimum, s.maximum)
    cum = np.cumsum(s.counts).astype(np.float64)
    before = cum - s.counts
    x = np.column_stack([lo, hi]).ravel()
    f = np.column_stack([before, cum]).ravel()
    return x, f


def order_statistics(s: DhSummary, ranks: NDArray[np.int64]) -> NDArray[np.float64]:
    """Estimate of the rank-th smallest value (0-based) for each rank."""
    x, f = _cdf_knots(s)
    return np.interp(ranks + 0.5, f, x)


def abs_order_statistics(
    s: DhSummary, ranks: NDArray[np.int64], center: float
) -> NDArray[np.float64]:
    """Estimate of the rank-th smallest |value - center|: solves F(c+t) - F(c-t) = rank + 0.5."""
    x, f = _cdf_knots(s)
    target = ranks + 0.5
    lo = np.zeros(target.shape)
    hi = np.full(target.shape, max(abs(s.maximum - center), abs(s.minimum - center)) * 1.000001)
    for _ in range(64):
        mid = 0.5 * (lo + hi)
        with np.errstate(invalid="ignore", over="ignore"):  # subnormal-wide bins
            inside = np.interp(center + mid, x, f) - np.interp(center - mid, x, f)
        below = inside < target
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    return hi
