"""Mergeable summaries of dh: exact moments plus a fine histogram for the robust quantiles.

Median, NMAD and quantiles do not add up across tiles, so each tile (and each region or stratum
within it) is summarised by a small object that *does* merge: the count, mean and sum of squared
deviations (merged exactly with Chan's formula), the exact minimum and maximum, and a sparse
histogram of dh over fixed bins that are the same for every tile. Merging is adding counts, so it is
associative and commutative, and a merged summary equals the summary of all pixels at once.

The bins (workers/stats/bins.py): width ``LINEAR_WIDTH_M`` (0.2 mm) for |dh| < ``LINEAR_LIMIT_M``
(2 m); beyond that, geometric bins whose width is ``RELATIVE_WIDTH`` (0.01 %) of their distance
from zero, so a blunder of 50 m lands in a 5 mm bin. Only non-empty bins are stored (bin index,
count).

Quantiles are read back from the histogram as in ``numpy.quantile``, each with a bound that always
holds (workers/stats/quantiles.py). The NMAD's bound adds the median's (the MAD moves by at most
as much as its centre): 1.4826 x (bound of the MAD about the estimated median + bound of the
median). :func:`statistic_bounds` gives the bounds of median, NMAD, q683_abs and q95_abs.

Units are those of the values summarised (metres throughout demaudit). NaN and infinite values are
ignored by :func:`summarise`.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from demaudit.workers.stats import packing
from demaudit.workers.stats.bins import (
    LINEAR_WIDTH_M,
    RELATIVE_WIDTH,
    added_parts,
    sparse_histogram,
)
from demaudit.workers.stats.quantiles import (
    abs_quantile,
    abs_quantile_bounds,
    layout_of,
    quantile,
    quantile_bounds,
)

NMAD_FACTOR = 1.4826  # 1 / Phi^-1(0.75), Höhle & Höhle (2009)
STAT_KEYS = ("count", "mean", "std", "rmse", "median", "nmad", "q683_abs", "q95_abs", "min", "max")


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

    def __reduce__(self) -> tuple[Any, tuple[Any, ...]]:
        """Pickled with the histogram packed (workers/stats/packing.py: about a quarter of the
        bytes a tile result carries from its worker to the client); unpickled the same."""
        moments = (self.count, self.mean, self.m2, self.minimum, self.maximum)
        return _unpickled, (*moments, packing.pack(self.bins, self.counts))


def _unpickled(
    count: int, mean: float, m2: float, minimum: float, maximum: float, packed: packing.Packed
) -> DhSummary:
    """The summary DhSummary.__reduce__ pickled."""
    return DhSummary(count, mean, m2, minimum, maximum, *packing.unpack(packed))


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
    bins, counts = sparse_histogram(x)
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
    bins, counts = added_parts([(s.bins, s.counts) for s in parts])
    return DhSummary(
        n,
        float(mean),
        float(m2),
        min(s.minimum for s in parts),
        max(s.maximum for s in parts),
        bins,
        counts,
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
    layout = layout_of(s)
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


def statistic_bounds(s: DhSummary) -> dict[str, float | None]:
    """Bounds (metres) on the error of median, nmad, q683_abs and q95_abs as
    :func:`statistics` reads them; None for an empty summary."""
    if s.count == 0:
        return {"median": None, "nmad": None, "q683_abs": None, "q95_abs": None}
    layout = layout_of(s)
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
