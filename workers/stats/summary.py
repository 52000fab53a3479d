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
The true order statistic lies in the same bin (clipped to the exact minimum and maximum), so each
order statistic is off by at most that bin's width. A quantile interpolates between the two order
statistics j and j + 1 that bracket it, with weights 1 - g and g, so its bound is
(1 - g) w_j + g w_(j+1), read from the two bins that actually hold them
(:func:`quantile_bounds`). That is 0.2 mm (or 0.01 % of the value beyond 2 m) when both lie in
one bin, but can be far more when the quantile falls between two distant occupied bins (e.g. the
median of a bimodal +-3,000 m set: 0.3 m wide bins either side of a median near 0).

For |value - c| the rank-th smallest lies between the rank-th smallest of the bins' nearest and
farthest distances from c, and so does its estimate (:func:`abs_quantile_bounds`). The NMAD's
bound adds the median's (the MAD moves by at most as much as its centre):
1.4826 x (bound of the MAD about the estimated median + bound of the median).
:func:`statistic_bounds` gives all four; a few ulps of rounding are added to each.

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

    Moments merge with Chan's formula; histograms by adding their integer counts exactly.
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
    bins, counts = _added_histograms(all_bins, all_counts)
    return DhSummary(
        n,
        float(mean),
        float(m2),
        min(s.minimum for s in parts),
        max(s.maximum for s in parts),
        bins,
        counts,
    )


def _added_histograms(
    bins: NDArray[np.int64], counts: NDArray[np.int64]
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    """Sorted distinct bins and their summed counts. Large inputs (a batch of tile histograms)
    add their linear bins on one dense counter instead of sorting; the result is the same."""
    if bins.size < _DENSE_ADD_FROM:
        return _sorted_sums(bins, counts)
    column = bins + _K_LIMIT
    tail = column.view(np.uint64) >= 2 * _K_LIMIT  # negative columns wrap to huge
    linear = ~tail
    dense = np.bincount(column[linear], weights=counts[linear], minlength=2 * _K_LIMIT)
    (nonzero,) = np.nonzero(dense)
    tail_bins, tail_counts = _sorted_sums(bins[tail], counts[tail])
    low = np.searchsorted(tail_bins, 0)  # tails below the linear bins, then above
    return (
        np.concatenate([tail_bins[:low], nonzero - _K_LIMIT, tail_bins[low:]]).astype(np.int64),
        np.concatenate([tail_counts[:low], dense[nonzero].astype(np.int64), tail_counts[low:]]),
    )


def _sorted_sums(
    bins: NDArray[np.int64], counts: NDArray[np.int64]
) -> tuple[NDArray[np.int64], NDArray[np.int64]]:
    if bins.size == 0:
        return bins.astype(np.int64), counts.astype(np.int64)
    order = np.argsort(bins, kind="stable")
    sorted_bins = bins[order]
    starts = np.flatnonzero(np.r_[True, sorted_bins[1:] != sorted_bins[:-1]])
    summed = np.add.reduceat(counts[order], starts)
    return sorted_bins[starts].astype(np.int64), summed.astype(np.int64)


_DENSE_ADD_FROM = 4096  # entries; below this one sort is cheaper than the dense counter


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
    layout = _layout(s)
    median = float(quantile(s, 0.5, layout=layout))
    mad = float(abs_quantile(s, 0.5, center=median, layout=layout))
    abs_q = abs_quantile(s, np.array([0.683, 0.95]), center=0.0, layout=layout)
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


def quantile(s: DhSummary, p: ArrayLike, *, layout: _Layout | None = None) -> NDArray[np.float64]:
    """Quantile(s) p of the summarised values, as numpy.quantile's default method."""
    return _interpolate_order_statistics(
        s, p, lambda ranks: order_statistics(s, ranks, layout=layout)
    )


def abs_quantile(
    s: DhSummary, p: ArrayLike, *, center: float = 0.0, layout: _Layout | None = None
) -> NDArray[np.float64]:
    """Quantile(s) p of |value - center|, as numpy.quantile's default method."""
    return _interpolate_order_statistics(
        s, p, lambda ranks: abs_order_statistics(s, ranks, center, layout=layout)
    )


def quantile_bound_m(value: float) -> float:
    """The width of the bin holding ``value`` (metres): the accuracy of a quantile only when
    both order statistics it interpolates lie in that bin (e.g. dense, unimodal data). For a
    bound that always holds use :func:`quantile_bounds` / :func:`statistic_bounds`."""
    return max(LINEAR_WIDTH_M, RELATIVE_WIDTH * abs(value))


def nmad_bound_m(median: float, nmad: float) -> float:
    """The NMAD's accuracy from the bin widths at the median and median + MAD (metres), under
    the same proviso as :func:`quantile_bound_m`; see :func:`statistic_bounds`."""
    mad = nmad / NMAD_FACTOR
    return NMAD_FACTOR * (LINEAR_WIDTH_M + quantile_bound_m(abs(median) + mad))


#: Floating-point slack added to every bound, relative to the magnitudes involved.
_ROUNDING = 1.0e-12


def quantile_bounds(
    s: DhSummary, p: ArrayLike, *, layout: _Layout | None = None
) -> NDArray[np.float64]:
    """Bound (metres) on |quantile(s, p) - the exact quantile of the values|, from the bins
    that hold the two order statistics the quantile interpolates."""
    return _interpolated_bounds(
        s, p, lambda ranks: order_statistic_brackets(s, ranks, layout=layout)
    )


def abs_quantile_bounds(
    s: DhSummary, p: ArrayLike, *, center: float = 0.0, layout: _Layout | None = None
) -> NDArray[np.float64]:
    """Bound (metres) on |abs_quantile(s, p, center=center) - the exact quantile of
    |value - center||."""
    return _interpolated_bounds(
        s,
        p,
        lambda ranks: abs_order_statistic_brackets(s, ranks, center, layout=layout),
        scale=abs(center),
    )


def statistic_bounds(s: DhSummary) -> dict[str, float | None]:
    """Bounds (metres) on the error of median, nmad, q683_abs and q95_abs as
    :func:`statistics` reads them; None for an empty summary."""
    if s.count == 0:
        return {"median": None, "nmad": None, "q683_abs": None, "q95_abs": None}
    layout = _layout(s)
    median = float(quantile(s, 0.5, layout=layout))
    median_bound = float(quantile_bounds(s, 0.5, layout=layout))
    mad_bound = float(abs_quantile_bounds(s, 0.5, center=median, layout=layout))
    abs_bounds = abs_quantile_bounds(s, np.array([0.683, 0.95]), center=0.0, layout=layout)
    return {
        "median": median_bound,
        "nmad": NMAD_FACTOR * (mad_bound + median_bound),
        "q683_abs": float(abs_bounds[0]),
        "q95_abs": float(abs_bounds[1]),
    }


def order_statistic_brackets(
    s: DhSummary, ranks: NDArray[np.int64], *, layout: _Layout | None = None
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """For each 0-based rank, the interval holding both the rank-th smallest value and its
    estimate: the edges of its bin, clipped to the exact minimum and maximum."""
    layout = layout or _layout(s)
    at = np.searchsorted(layout.cum, np.asarray(ranks), side="right")
    return layout.lo[at], layout.hi[at]


def abs_order_statistic_brackets(
    s: DhSummary, ranks: NDArray[np.int64], center: float, *, layout: _Layout | None = None
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """For each 0-based rank, an interval holding the rank-th smallest |value - center| and its
    estimate: the rank-th smallest of the bins' nearest and of their farthest distances from
    center, each bin counted as often as it holds values (order statistics are monotone in every
    value, and the estimate's spread-out counts obey the same two limits)."""
    layout = layout or _layout(s)
    lo, hi = layout.lo, layout.hi
    near = np.maximum(np.maximum(lo - center, center - hi), 0.0)
    far = np.maximum(np.abs(lo - center), np.abs(hi - center))
    ranks = np.asarray(ranks)
    return _weighted_order_statistic(near, s.counts, ranks), _weighted_order_statistic(
        far, s.counts, ranks
    )


def _weighted_order_statistic(
    values: NDArray[np.float64], counts: NDArray[np.integer], ranks: NDArray[np.int64]
) -> NDArray[np.float64]:
    order = np.argsort(values, kind="stable")
    cum = np.cumsum(counts[order])
    return values[order][np.searchsorted(cum, ranks, side="right")]


@dataclass(frozen=True, eq=False)
class _Layout:
    """What reading values back needs of a summary, computed once per summary read: the bin
    edges clipped to the exact minimum and maximum, and the cumulative counts."""

    lo: NDArray[np.float64]
    hi: NDArray[np.float64]
    cum: NDArray[np.int64]


def _layout(s: DhSummary) -> _Layout:
    lo, hi = bin_edges(s.bins)
    cum = np.cumsum(s.counts, dtype=np.int64)
    return _Layout(np.clip(lo, s.minimum, s.maximum), np.clip(hi, s.minimum, s.maximum), cum)


def _interpolated_bounds(s, p, brackets, *, scale=0.0):  # type: ignore[no-untyped-def]
    """(1 - g) w_j + g w_(j+1) for the ranks j, j + 1 and weight g a quantile interpolates,
    where w is the width of each order statistic's bracket; plus rounding (relative to the
    magnitudes and scale)."""
    p_arr = np.atleast_1d(np.asarray(p, dtype=np.float64))
    if s.count == 0:
        return np.full(p_arr.shape, np.nan)
    j, j_next, frac = _ranks_and_weights(s.count, p_arr)
    lo, hi = brackets(np.concatenate([j, j_next]))
    width = hi - lo
    bound = (1 - frac) * width[: j.size] + frac * width[j.size :]
    magnitude = np.maximum(np.abs(lo), np.abs(hi))
    magnitude = np.maximum(magnitude[: j.size], magnitude[j.size :]) + scale
    rounding = _ROUNDING * magnitude + 4 * np.spacing(magnitude)  # the latter for subnormals
    return (bound + rounding).reshape(np.shape(p))


def _ranks_and_weights(
    n: int, p: NDArray[np.float64]
) -> tuple[NDArray[np.int64], NDArray[np.int64], NDArray[np.float64]]:
    """The order statistics (0-based) numpy.quantile's linear method interpolates, and the
    weight of the upper one."""
    h = (n - 1) * p
    j = np.floor(h).astype(np.int64)
    return j, np.minimum(j + 1, n - 1), h - j


# -- bins ---------------------------------------------------------------------------------------


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
        t_k[pos] = _K_LIMIT + np.floor(np.log(t[pos] / LINEAR_LIMIT_M) / _LOG_RATIO)
        neg = ~pos
        t_k[neg] = -_K_LIMIT - 1 - np.floor(np.log(-t[neg] / LINEAR_LIMIT_M) / _LOG_RATIO)
        k.reshape(-1)[tail] = t_k
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
    column = bin_index(x) + _K_LIMIT
    outside = column.view(np.uint64) >= 2 * _K_LIMIT  # negative columns wrap to huge
    (tail,) = np.nonzero(outside)
    tail_bins, tail_counts = np.unique(column[tail] - _K_LIMIT, return_counts=True)
    column[tail] = 2 * _K_LIMIT  # one extra counter for the tails, dropped below
    dense = np.bincount(column, minlength=2 * _K_LIMIT + 1)[:-1]
    (nonzero,) = np.nonzero(dense)
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
    j, j_next, frac = _ranks_and_weights(s.count, p_arr)
    ranks = np.concatenate([j, j_next])
    values = estimate(ranks)
    lower, upper = values[: j.size], values[j.size :]
    result = lower + frac * (upper - lower)
    return result.reshape(np.shape(p))


def _cdf_knots(layout: _Layout) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Knots of the piecewise-linear CDF that spreads each bin's count evenly across it."""
    cum = layout.cum.astype(np.float64)
    before = np.concatenate([[0.0], cum[:-1]])
    x = np.column_stack([layout.lo, layout.hi]).ravel()
    f = np.column_stack([before, cum]).ravel()
    return x, f


def order_statistics(
    s: DhSummary, ranks: NDArray[np.int64], *, layout: _Layout | None = None
) -> NDArray[np.float64]:
    """Estimate of the rank-th smallest value (0-based) for each rank (kept, against rounding,
    inside the bin that holds the true value)."""
    layout = layout or _layout(s)
    x, f = _cdf_knots(layout)
    brackets = order_statistic_brackets(s, ranks, layout=layout)
    return np.clip(np.interp(ranks + 0.5, f, x), *brackets)


def abs_order_statistics(
    s: DhSummary, ranks: NDArray[np.int64], center: float, *, layout: _Layout | None = None
) -> NDArray[np.float64]:
    """Estimate of the rank-th smallest |value - center|: solves F(c+t) - F(c-t) = rank + 0.5
    by bisection, kept inside the interval that provably holds the true value (which the
    solution lies in too, but bisection and interpolation lose precision in subnormal-wide
    bins)."""
    layout = layout or _layout(s)
    x, f = _cdf_knots(layout)
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
    return np.clip(hi, *abs_order_statistic_brackets(s, ranks, center, layout=layout))
