"""Robust inference on a merged dh summary (pure): outlier removal by a named rule and
distribution-free confidence intervals of quantiles (Höhle & Höhle 2009)."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from demaudit.workers.stats import summary as dhs
from demaudit.workers.stats.bins import bin_edges
from demaudit.workers.stats.quantiles import abs_order_statistics, order_statistics
from demaudit.workers.stats.summary import DhSummary

Z95 = 1.959963984540054  # standard normal quantile 0.975


def outlier_limits(stats: dict[str, Any], *, rule: str, factor: float) -> tuple[float, float]:
    """The interval of dh kept by a rule: 'nmad': median +- factor x NMAD; 'rmse': +- factor x
    RMSE (around zero)."""
    if rule == "nmad":
        half = factor * stats["nmad"]
        return stats["median"] - half, stats["median"] + half
    if rule == "rmse":
        half = factor * stats["rmse"]
        return -half, half
    raise ValueError(f"unknown outlier rule {rule!r}")


def within(s: DhSummary, low: float, high: float) -> DhSummary:
    """The summary restricted to bins whose centre lies in [low, high].

    Moments are recomputed from bin centres, so they carry the histogram's resolution (0.2 mm,
    or 0.01 % beyond 2 m) instead of being exact.
    """
    lo, hi = bin_edges(s.bins)
    centre = 0.5 * (lo + hi)
    keep = (centre >= low) & (centre <= high)
    if not keep.any():
        return dhs.empty()
    counts = s.counts[keep]
    values = np.clip(centre[keep], s.minimum, s.maximum)
    n = int(counts.sum())
    mean = float(np.sum(values * counts) / n)
    m2 = float(np.sum(counts * (values - mean) ** 2))
    return DhSummary(
        n,
        mean,
        m2,
        float(max(lo[keep][0], s.minimum)),
        float(min(hi[keep][-1], s.maximum)),
        s.bins[keep],
        counts,
    )


def without_outliers(s: DhSummary, *, rule: str, factor: float) -> dict[str, Any]:
    """Statistics after removing outliers by rule, with the rule, limits and number removed."""
    stats = dhs.statistics(s)
    if s.count == 0:
        return {"rule": rule, "factor": factor, "removed": 0, "stats": stats}
    low, high = outlier_limits(stats, rule=rule, factor=factor)
    kept = within(s, low, high)
    return {
        "rule": _rule_text(rule, factor),
        "limits_m": [low, high],
        "removed": s.count - kept.count,
        "removed_fraction": (s.count - kept.count) / s.count,
        "stats": dhs.statistics(kept),
    }


def _rule_text(rule: str, factor: float) -> str:
    if rule == "nmad":
        return f"|dh - median| > {factor:g} x NMAD"
    return f"|dh| > {factor:g} x RMSE"


#: Said next to every interval of pixel statistics.
INDEPENDENCE_NOTE = (
    "distribution-free intervals from order statistics (Höhle & Höhle 2009); they assume "
    "independent pixels: spatially correlated errors make the true intervals wider"
)


#: asymptotic standard error of the NMAD at the Gaussian, in units of sigma / sqrt(n): the MAD's
#: asymptotic efficiency there is 36.75 % of the standard deviation's (Rousseeuw & Croux 1993,
#: JASA 88:1273, section 1), whose variance is sigma^2 / 2n, so Var(NMAD) = sigma^2 / (2 x
#: 0.3675 n); equivalently 1.4826^2 / (16 phi(0.6745)^2 n) from the sample median of |x|.
NMAD_SE_FACTOR = math.sqrt(1.0 / (2.0 * 0.3675))
NMAD_INTERVAL_NOTE = (
    "NMAD intervals: NMAD +- 1.96 SE, SE = 1.1664 NMAD / sqrt(n), the asymptotic standard error "
    "of the NMAD at the Gaussian (MAD efficiency 36.75 %, Rousseeuw & Croux 1993); they assume "
    "independent pixels and a Gaussian core"
)


def nmad_interval(nmad: float, count: int, *, z: float = 1.959964) -> tuple[float, float] | None:
    """95 % interval of the NMAD from its asymptotic standard error at the Gaussian,
    NMAD_SE_FACTOR x NMAD / sqrt(n) (assumes independent values and a Gaussian core; heavier
    tails widen the true interval). None for fewer than 2 values; the low end is at least 0."""
    if count < 2 or not math.isfinite(nmad):
        return None
    se = NMAD_SE_FACTOR * nmad / math.sqrt(count)
    return max(nmad - z * se, 0.0), nmad + z * se


def order_statistic_ranks(n: int, p: float, *, z: float = Z95) -> tuple[int | None, int | None]:
    """0-based ranks of the order statistics bounding a distribution-free confidence interval
    of quantile p: n p -/+ z sqrt(n p (1 - p)) (1-based, rounded outward). An end whose rank
    falls outside 1..n has no order statistic to bound it: it is open (None)."""
    low, high = _ranks_1based(n, p, z)
    return (low - 1 if low >= 1 else None), (high - 1 if high <= n else None)


def _ranks_1based(n: int, p: float, z: float) -> tuple[int, int]:
    half = z * np.sqrt(n * p * (1 - p))
    return int(np.floor(n * p - half)), int(np.ceil(n * p + half))


def confidence_intervals(s: DhSummary) -> dict[str, Any]:
    """95 % intervals for the median of dh and for q683_abs and q95_abs of |dh|: [low, high]
    in metres, an open end as None, with notes saying which ends are open and why, and the
    assumption of independent pixels."""
    out: dict[str, Any] = {"median": None, "q683_abs": None, "q95_abs": None}
    notes: list[str] = []
    if s.count < 2:
        return out | {"notes": ["fewer than 2 values: no interval"], "assumes": INDEPENDENCE_NOTE}
    for key, p in (("median", 0.5), ("q683_abs", 0.683), ("q95_abs", 0.95)):
        low, high = order_statistic_ranks(s.count, p)
        ranks = np.array([r for r in (low, high) if r is not None], dtype=np.int64)
        if key == "median":
            values = order_statistics(s, ranks)
        else:
            values = abs_order_statistics(s, ranks, 0.0)
        it = iter(float(v) for v in values)
        out[key] = [None if low is None else next(it), None if high is None else next(it)]
        notes += _open_notes(key, s.count, p, low is None, high is None)
    return out | {"notes": notes, "assumes": INDEPENDENCE_NOTE}


def _open_notes(key: str, n: int, p: float, low_open: bool, high_open: bool) -> list[str]:
    low, high = _ranks_1based(n, p, Z95)
    out = []
    if low_open:
        out.append(f"{key}: lower end open (rank {low} < 1 with n = {n})")
    if high_open:
        out.append(f"{key}: upper end open (rank {high} > n = {n})")
    return out
