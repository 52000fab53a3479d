"""What the figures draw, computed without matplotlib (pure): colour limits, histogram bars and
the two Gaussian curves, tile values and grades, the worst tiles, strata rows with their
intervals (median and NMAD; the NMAD's from :func:`~demaudit.workers.stats.robust.nmad_interval`,
re-exported here), re-check verdicts. Map placement (scale bar, inset outline) is in
:mod:`demaudit.workers.outputs.figures.geometry`.

Everything here takes the job's own numbers (summary.json entries or a mergeable
:class:`~demaudit.workers.stats.summary.DhSummary`) and returns plain numbers and arrays, so the
drawing modules
only place them and the tests check them against numpy.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.checkpoints.grading import ASPRS_CLASSES_CM
from demaudit.workers.stats import summary as dhs
from demaudit.workers.stats.bins import bin_edges
from demaudit.workers.stats.quantiles import order_statistics, quantile
from demaudit.workers.stats.robust import NMAD_INTERVAL_NOTE as NMAD_INTERVAL_NOTE
from demaudit.workers.stats.robust import NMAD_SE_FACTOR as NMAD_SE_FACTOR
from demaudit.workers.stats.robust import nmad_interval as nmad_interval
from demaudit.workers.stats.robust import order_statistic_ranks

#: colour limits of the dh map: median +- LIMIT_NMADS x NMAD of all valid pixels
LIMIT_NMADS = 3.0
#: the narrowest half-width of the colour scale (metres), when the NMAD is (nearly) zero
MIN_HALF_WIDTH_M = 0.05
#: the histogram shows median +- HIST_NMADS x NMAD, widened to the 1st and 99th percentiles
HIST_NMADS = 6.0
TILE_STATISTICS = ("median", "nmad", "q95_abs", "rmse", "grade")
#: the tile maps drawn when the spec does not say (figures.tile_statistics)
DEFAULT_TILE_STATISTICS = ("median", "nmad", "grade")
Bounds = tuple[float, float, float, float]
VERDICT_ORDER = ("regressed", "improved", "unchanged", "new", "removed", "reused")


@dataclass(frozen=True)
class Limits:
    """Colour limits (metres) and the sentence that says how they were chosen."""

    low: float
    high: float
    rule: str
    centre: float
    nmad: float

    def as_dict(self) -> dict[str, Any]:
        return {"low_m": self.low, "high_m": self.high, "rule": self.rule}


def robust_limits(median: float, nmad: float, *, k: float = LIMIT_NMADS) -> Limits:
    """median +- k x NMAD (half-width at least MIN_HALF_WIDTH_M), from the merged histogram's
    median and NMAD: a few blunders do not stretch the colour scale."""
    half = max(k * nmad, MIN_HALF_WIDTH_M)
    rule = f"median +- {k:g} x NMAD of all valid pixels (half-width at least {MIN_HALF_WIDTH_M} m)"
    return Limits(median - half, median + half, rule, median, nmad)


def limits_of_summary(s: dhs.DhSummary, *, k: float = LIMIT_NMADS) -> Limits | None:
    """Robust limits of a merged summary; None when it holds no values."""
    stats = dhs.statistics(s)
    if not stats["count"]:
        return None
    return robust_limits(float(stats["median"]), float(stats["nmad"]), k=k)  # type: ignore[arg-type]


def clipped_share(s: dhs.DhSummary, limits: Limits) -> tuple[float, float]:
    """Fractions of the values below and above the colour limits (read from the bins)."""
    if s.count == 0:
        return 0.0, 0.0
    low, high = bin_edges(s.bins)
    centres = (low + high) / 2
    below = int(s.counts[centres < limits.low].sum())
    above = int(s.counts[centres > limits.high].sum())
    return below / s.count, above / s.count


@dataclass(frozen=True)
class Histogram:
    """Display bars re-binned from a summary's fine bins, and the two Gaussians per bar."""

    edges: NDArray[np.float64]
    counts: NDArray[np.float64]
    below: int
    above: int
    x: NDArray[np.float64]
    gauss_moments: NDArray[np.float64]
    gauss_robust: NDArray[np.float64]
    mean: float
    std: float
    median: float
    nmad: float


def histogram_window(s: dhs.DhSummary) -> tuple[float, float]:
    """The dh range the histogram shows: median +- HIST_NMADS x NMAD, widened to the 1st and
    99th percentiles, never wider than the data."""
    stats = dhs.statistics(s)
    median, nmad = float(stats["median"]), float(stats["nmad"])  # type: ignore[arg-type]
    q01, q99 = (float(v) for v in quantile(s, [0.01, 0.99]))
    half = max(HIST_NMADS * nmad, MIN_HALF_WIDTH_M)
    low = max(min(median - half, q01), s.minimum)
    high = min(max(median + half, q99), s.maximum)
    if high <= low:
        low, high = low - MIN_HALF_WIDTH_M, high + MIN_HALF_WIDTH_M
    return low, high


def display_histogram(s: dhs.DhSummary, *, bars: int = 120, points: int = 400) -> Histogram:
    """Counts per display bar from the summary's stored bins (each fine bin goes to the bar
    holding its centre), the counts beyond the window, and the expected count per bar of a
    Gaussian with the mean/std and of one with the median/NMAD (same total count)."""
    if s.count == 0:
        raise ValueError("histogram of an empty summary")
    low, high = histogram_window(s)
    edges = np.linspace(low, high, bars + 1)
    lo_k, hi_k = bin_edges(s.bins)
    centres = (lo_k + hi_k) / 2
    which = np.searchsorted(edges, centres, side="right") - 1
    inside = (which >= 0) & (which < bars)
    counts = np.bincount(which[inside], weights=s.counts[inside], minlength=bars).astype(float)
    stats = dhs.statistics(s)
    width = (high - low) / bars
    x = np.linspace(low, high, points)
    mean, std = float(stats["mean"]), float(stats["std"] or 0.0)  # type: ignore[arg-type]
    median, nmad = float(stats["median"]), float(stats["nmad"])  # type: ignore[arg-type]
    return Histogram(
        edges=edges,
        counts=counts,
        below=int(s.counts[centres < low].sum()),
        above=int(s.counts[which >= bars].sum()),
        x=x,
        gauss_moments=gaussian_counts(x, mean, std, count=s.count, bar_width=width),
        gauss_robust=gaussian_counts(x, median, nmad, count=s.count, bar_width=width),
        mean=mean,
        std=std,
        median=median,
        nmad=nmad,
    )


def gaussian_counts(
    x: NDArray[np.float64], centre: float, sigma: float, *, count: int, bar_width: float
) -> NDArray[np.float64]:
    """Expected count per bar of width bar_width at x for count values from N(centre, sigma);
    zeros when sigma is 0."""
    if sigma <= 0 or not math.isfinite(sigma):
        return np.zeros_like(x)
    z = (x - centre) / sigma
    return count * bar_width * np.exp(-0.5 * z * z) / (sigma * math.sqrt(2 * math.pi))


def tile_grade(rmse_m: float | None) -> str | None:
    """The finest ASPRS vertical accuracy class (cm) whose RMSE_z limit the tile's RMSE meets
    (ASPRS Positional Accuracy Standards 2014, Table 7.5: class X cm <=> RMSE_z <= X cm;
    indicative: all pixels, not checkpoints); None without a value, '>333.3' beyond."""
    if rmse_m is None or not math.isfinite(rmse_m):
        return None
    for cm in ASPRS_CLASSES_CM:
        if rmse_m * 100.0 <= cm:
            return f"{cm:g} cm"
    return f">{ASPRS_CLASSES_CM[-1]:g} cm"


def grade_rank(grade: str | None) -> int:
    """Position of a grade label in the class list (finest 0), len(classes) beyond, -1 none."""
    if grade is None:
        return -1
    labels = [f"{cm:g} cm" for cm in ASPRS_CLASSES_CM]
    return labels.index(grade) if grade in labels else len(labels)


@dataclass(frozen=True)
class TileValue:
    tile: str
    bounds: tuple[float, float, float, float]
    status: str
    value: float | None
    grade: str | None


def tile_values(tiles: Sequence[Mapping[str, Any]], statistic: str) -> list[TileValue]:
    """Each tile with bounds: its statistic (None when it has none) and its indicative grade."""
    if statistic not in TILE_STATISTICS:
        raise ValueError(f"statistic must be one of {TILE_STATISTICS}, not {statistic!r}")
    out = []
    for t in tiles:
        if not t.get("bounds"):
            continue
        stats = t.get("stats") or {}
        grade = tile_grade(stats.get("rmse")) if stats.get("count") else None
        if statistic == "grade":
            value = float(grade_rank(grade)) if grade is not None else None
        else:
            raw = stats.get(statistic) if stats.get("count") else None
            value = float(raw) if raw is not None else None
        out.append(TileValue(t["tile"], tuple(t["bounds"]), t.get("status", ""), value, grade))  # type: ignore[arg-type]
    return out


def badness(statistic: str, value: float) -> float:
    """How bad a tile's value is: |median| for the median, the value itself otherwise."""
    return abs(value) if statistic == "median" else value


def worst_tiles(values: Sequence[TileValue], statistic: str, *, n: int = 5) -> list[str]:
    """Ids of the n worst tiles (largest |median|, NMAD, q95, RMSE, or coarsest grade); ties
    broken by tile id."""
    scored = [(badness(statistic, v.value), v.tile) for v in values if v.value is not None]
    scored.sort(key=lambda p: (-p[0], p[1]))
    return [tile for _, tile in scored[:n]]


def value_limits(values: Sequence[TileValue], statistic: str) -> tuple[float, float]:
    """Colour range of the tile map: symmetric about 0 for the median (at the largest |median|),
    0 to the largest value for spreads; the grade's class positions as they are."""
    data = np.array([v.value for v in values if v.value is not None], dtype=float)
    if statistic == "grade":
        return -0.5, len(ASPRS_CLASSES_CM) + 0.5
    if data.size == 0:
        return 0.0, 1.0
    if statistic == "median":
        half = float(np.max(np.abs(data))) or MIN_HALF_WIDTH_M
        return -half, half
    top = float(np.max(data))
    return 0.0, top if top > 0 else MIN_HALF_WIDTH_M


@dataclass(frozen=True)
class StratumRow:
    label: str
    median: float
    nmad: float
    count: int
    median_ci: tuple[float | None, float | None] | None
    nmad_ci: tuple[float, float] | None = None


def median_interval(s: dhs.DhSummary) -> tuple[float | None, float | None] | None:
    """The 95 % order-statistic interval of the median, as robust.confidence_intervals gives it
    (an open end None), without the intervals of the |dh| quantiles the figure does not show."""
    if s.count < 2:
        return None
    low, high = order_statistic_ranks(s.count, 0.5)
    ranks = np.array([r for r in (low, high) if r is not None], dtype=np.int64)
    values = iter(float(v) for v in order_statistics(s, ranks))
    return (None if low is None else next(values), None if high is None else next(values))


def tile_statistics(spec: Mapping[str, Any] | None) -> tuple[str, ...]:
    """The statistics of the tile maps the job spec asks for (figures.tile_statistics), or
    DEFAULT_TILE_STATISTICS; unknown names are refused."""
    asked = ((spec or {}).get("figures") or {}).get("tile_statistics")
    if asked is None:
        return DEFAULT_TILE_STATISTICS
    unknown = [s for s in asked if s not in TILE_STATISTICS]
    if unknown:
        raise ValueError(f"figures.tile_statistics: {unknown} not among {TILE_STATISTICS}")
    return tuple(asked)


def strata_rows(
    entries: Sequence[Mapping[str, Any]],
    prefix: str,
    summaries: Mapping[str, dhs.DhSummary] | None = None,
) -> list[StratumRow]:
    """The strata whose key starts with prefix (e.g. 'slope_deg:' or 'landcover:'), in order,
    with a 95 % interval of the median: the entry's own ``confidence_95`` when summary.json has
    it, else computed from the stratum's merged summary when given, else none; and a 95 %
    interval of the NMAD (nmad_interval)."""
    rows = []
    for entry in entries:
        key = entry["stratum"]
        stats = entry.get("stats") or {}
        if not key.startswith(prefix) or "/" in key or not stats.get("count"):
            continue
        ci = (entry.get("confidence_95") or {}).get("median")
        if ci is None and summaries is not None and key in summaries:
            ci = median_interval(summaries[key])
        nmad, count = float(stats["nmad"]), int(stats["count"])
        median_ci = (ci[0], ci[1]) if ci is not None else None
        rows.append(
            StratumRow(
                key[len(prefix) :],
                float(stats["median"]),
                nmad,
                count,
                median_ci,
                nmad_interval(nmad, count),
            )
        )
    return rows


def recheck_tiles(
    recheck: Mapping[str, Any], tiles: Sequence[Mapping[str, Any]]
) -> list[tuple[str, tuple[float, float, float, float], str]]:
    """(tile, bounds, verdict) for every tile with bounds: the change report's verdict for the
    recomputed ones, 'reused' for the others."""
    verdicts = {t["tile"]: t["verdict"] for t in recheck.get("tiles", [])}
    return [
        (t["tile"], tuple(t["bounds"]), verdicts.get(t["tile"], "reused"))  # type: ignore[misc]
        for t in tiles
        if t.get("bounds")
    ]


def region_changes(recheck: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Per region: NMAD and median before and after, and the verdict (regions with both)."""
    out = []
    for r in recheck.get("regions", []):
        before, after = r.get("before") or {}, r.get("after") or {}
        if before.get("count") and after.get("count"):
            out.append(
                {
                    "region": r["region"],
                    "verdict": r["verdict"],
                    "nmad": (before["nmad"], after["nmad"]),
                    "median": (before["median"], after["median"]),
                }
            )
    return out
