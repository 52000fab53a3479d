"""Read quantiles back from a dh summary's histogram, with a bound that always holds.

Quantiles are read as in ``numpy.quantile`` (linear interpolation between order statistics,
method 7); each order statistic is placed inside its bin as if the bin's pixels were spread evenly.
The true order statistic lies in the same bin (clipped to the exact minimum and maximum), so each
order statistic is off by at most that bin's width. A quantile interpolates between the two order
statistics j and j + 1 that bracket it, with weights 1 - g and g, so its bound is
(1 - g) w_j + g w_(j+1), read from the two bins that actually hold them
(:func:`quantile_bounds`). That is 0.2 mm (or 0.01 % of the value beyond 2 m) when both lie in
one bin, but can be far more when the quantile falls between two distant occupied bins (e.g. the
median of a bimodal +-3,000 m set: 0.3 m wide bins either side of a median near 0).

For |value - c| the rank-th smallest lies between the rank-th smallest of the bins' nearest and
farthest distances from c, and so does its estimate (:func:`abs_quantile_bounds`). A few ulps of
rounding are added to each bound. Units: those of the values summarised (metres).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import ArrayLike, NDArray

from demaudit.workers.compiled import AVAILABLE
from demaudit.workers.stats.bins import bin_edges
from demaudit.workers.stats.kernels import abs_bisection, valley_order_statistics

if TYPE_CHECKING:
    from demaudit.workers.stats.summary import DhSummary


def quantile(s: DhSummary, p: ArrayLike, *, layout: Layout | None = None) -> NDArray[np.float64]:
    """Quantile(s) p of the summarised values, as numpy.quantile's default method."""
    return _interpolate_order_statistics(
        s, p, lambda ranks: order_statistics(s, ranks, layout=layout)
    )


def abs_quantile(
    s: DhSummary, p: ArrayLike, *, center: float = 0.0, layout: Layout | None = None
) -> NDArray[np.float64]:
    """Quantile(s) p of |value - center|, as numpy.quantile's default method."""
    return _interpolate_order_statistics(
        s, p, lambda ranks: abs_order_statistics(s, ranks, center, layout=layout)
    )


#: Floating-point slack added to every bound, relative to the magnitudes involved.
_ROUNDING = 1.0e-12


def quantile_bounds(
    s: DhSummary, p: ArrayLike, *, layout: Layout | None = None
) -> NDArray[np.float64]:
    """Bound (metres) on |quantile(s, p) - the exact quantile of the values|, from the bins
    that hold the two order statistics the quantile interpolates."""
    return _interpolated_bounds(
        s, p, lambda ranks: order_statistic_brackets(s, ranks, layout=layout)
    )


def abs_quantile_bounds(
    s: DhSummary, p: ArrayLike, *, center: float = 0.0, layout: Layout | None = None
) -> NDArray[np.float64]:
    """Bound (metres) on |abs_quantile(s, p, center=center) - the exact quantile of
    |value - center||."""
    return _interpolated_bounds(
        s,
        p,
        lambda ranks: abs_order_statistic_brackets(s, ranks, center, layout=layout),
        scale=abs(center),
    )


def order_statistic_brackets(
    s: DhSummary, ranks: NDArray[np.int64], *, layout: Layout | None = None
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """For each 0-based rank, the interval holding both the rank-th smallest value and its
    estimate: the edges of its bin, clipped to the exact minimum and maximum."""
    layout = layout or layout_of(s)
    at = np.searchsorted(layout.cum, np.asarray(ranks), side="right")
    return layout.lo[at], layout.hi[at]


def abs_order_statistic_brackets(
    s: DhSummary, ranks: NDArray[np.int64], center: float, *, layout: Layout | None = None
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """For each 0-based rank, an interval holding the rank-th smallest |value - center| and its
    estimate: the rank-th smallest of the bins' nearest and of their farthest distances from
    center, each bin counted as often as it holds values (order statistics are monotone in every
    value, and the estimate's spread-out counts obey the same two limits)."""
    layout = layout or layout_of(s)
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
    """The rank-th smallest of values (each counted counts times) for each rank. Distances of
    ascending bins from a centre fall, then rise: compiled, the two sides are merged instead of
    sorted (the same bits; kernels.valley_order_statistics says when it cannot)."""
    if AVAILABLE and ranks.ndim == 1:
        out = np.empty(ranks.shape)
        if valley_order_statistics(values, counts, ranks, out):
            return out
    order = np.argsort(values, kind="stable")
    cum = np.cumsum(counts[order])
    return values[order][np.searchsorted(cum, ranks, side="right")]


@dataclass(frozen=True, eq=False)
class Layout:
    """What reading values back needs of a summary, computed once per summary read: the bin
    edges clipped to the exact minimum and maximum, and the cumulative counts."""

    lo: NDArray[np.float64]
    hi: NDArray[np.float64]
    cum: NDArray[np.int64]

    @cached_property
    def knots(self) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
        """Knots (x, F) of the piecewise-linear CDF that spreads each bin's count evenly
        across it (built once per layout)."""
        cum = self.cum.astype(np.float64)
        before = np.concatenate([[0.0], cum[:-1]])
        x = np.column_stack([self.lo, self.hi]).ravel()
        f = np.column_stack([before, cum]).ravel()
        return x, f


def layout_of(s: DhSummary) -> Layout:
    lo, hi = bin_edges(s.bins)
    cum = np.cumsum(s.counts, dtype=np.int64)
    return Layout(np.clip(lo, s.minimum, s.maximum), np.clip(hi, s.minimum, s.maximum), cum)


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


def order_statistics(
    s: DhSummary, ranks: NDArray[np.int64], *, layout: Layout | None = None
) -> NDArray[np.float64]:
    """Estimate of the rank-th smallest value (0-based) for each rank (kept, against rounding,
    inside the bin that holds the true value)."""
    layout = layout or layout_of(s)
    x, f = layout.knots
    brackets = order_statistic_brackets(s, ranks, layout=layout)
    return np.clip(np.interp(ranks + 0.5, f, x), *brackets)


def abs_order_statistics(
    s: DhSummary, ranks: NDArray[np.int64], center: float, *, layout: Layout | None = None
) -> NDArray[np.float64]:
    """Estimate of the rank-th smallest |value - center|: solves F(c+t) - F(c-t) = rank + 0.5
    by bisection, kept inside the interval that provably holds the true value (which the
    solution lies in too, but bisection and interpolation lose precision in subnormal-wide
    bins)."""
    layout = layout or layout_of(s)
    x, f = layout.knots
    target = np.asarray(ranks + 0.5, dtype=np.float64)
    start = max(abs(s.maximum - center), abs(s.minimum - center)) * 1.000001
    if AVAILABLE:  # the same steps compiled (kernels._abs_bisection): no numpy call per step
        hi = np.empty(target.shape)
        abs_bisection(x, f, float(center), target.reshape(-1), start, _STEPS, hi.reshape(-1))
    else:
        hi = _abs_bisection_numpy(x, f, center, target, start)
    return np.clip(hi, *abs_order_statistic_brackets(s, ranks, center, layout=layout))


_STEPS = 64  # halvings of the bisection: to the last bit of a float64


def _abs_bisection_numpy(
    x: NDArray[np.float64],
    f: NDArray[np.float64],
    center: float,
    target: NDArray[np.float64],
    start: float,
) -> NDArray[np.float64]:
    """kernels._abs_bisection in numpy: the upper ends of the bisection intervals."""
    lo = np.zeros(target.shape)
    hi = np.full(target.shape, start)
    with np.errstate(invalid="ignore", over="ignore"):  # subnormal-wide bins
        for _ in range(_STEPS):
            mid = 0.5 * (lo + hi)
            inside = np.interp(center + mid, x, f) - np.interp(center - mid, x, f)
            below = inside < target
            lo = np.where(below, mid, lo)
            hi = np.where(below, hi, mid)
    return hi
