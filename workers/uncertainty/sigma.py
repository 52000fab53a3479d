"""The spread of stable dh as a function of terrain (pure): sigma_dh(slope, curvature).

sigma_dh = a + b * tan(slope)^c + d * |curvature| (metres; curvature as in
workers/uncertainty/sample.py, 1/m x 100), fitted to the NMAD of stable dh per (2-degree slope
bin x curvature bin) cell at the cell's mean slope and mean |curvature|, weights sqrt(count),
cells under MIN_BIN_COUNT pixels left out (heteroscedasticity binned by slope and curvature as in
Hugonnet et al. 2022, IEEE JSTARS 15, from memory; the additive form is our choice). With fewer
than 4 cells, or when the cells hold one curvature only, d = 0 and the slope part is fitted as
before; with fewer than 3 bins, a constant.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.stats.summary import DhSummary
from demaudit.workers.uncertainty.sample import CURVATURE_EDGES, N_CURVATURE, SLOPE_EDGES_DEG

MIN_BIN_COUNT = 100  # bins with fewer stable pixels are not fitted
ROUND = 9  # decimals kept of the cells' mean slope (degrees) and |curvature|
SLOPE_TABLE_EDGES = SLOPE_EDGES_DEG
CURVATURE_TABLE_EDGES = (*CURVATURE_EDGES, float("inf"))


@dataclass(frozen=True)
class SigmaModel:
    """sigma_dh(slope, curvature) = a + b * tan(slope)^c + d * |curvature| (metres)."""

    a: float
    b: float
    c: float
    d: float = 0.0

    def __call__(
        self,
        slope_deg: NDArray[np.float64] | float,
        curvature: NDArray[np.float64] | float = 0.0,
    ) -> NDArray[np.float64]:
        t = np.tan(np.radians(np.clip(slope_deg, 0.0, 89.0)))
        k = np.nan_to_num(np.asarray(curvature, dtype=np.float64), nan=0.0)
        return self.a + self.b * t**self.c + self.d * k  # type: ignore[no-any-return]


def _with_curvature(
    tk: tuple[NDArray[np.float64], NDArray[np.float64]], a: float, b: float, c: float, d: float
) -> NDArray[np.float64]:
    return a + b * tk[0] ** c + d * tk[1]  # type: ignore[no-any-return]


def fit_sigma(
    centres_deg: NDArray[np.float64],
    nmad: NDArray[np.float64],
    counts: NDArray[np.float64],
    curvature: NDArray[np.float64] | None = None,
) -> SigmaModel:
    """Fit the model (see module) to binned NMADs at (slope, curvature), weights sqrt(count)."""
    from scipy.optimize import curve_fit  # here: its import is left to jobs that fit

    t = np.tan(np.radians(centres_deg))
    constant = SigmaModel(float(np.average(nmad, weights=counts)), 0.0, 1.0)
    if len(t) < 3:
        return constant
    k = np.zeros_like(t) if curvature is None else np.asarray(curvature, dtype=np.float64)
    with_d = len(t) >= 4 and float(np.ptp(k)) > 0
    p0 = [float(nmad.min()), float(max(nmad.max() - nmad.min(), 1e-6)), 1.0]
    low, high = [0.0, 0.0, 0.5], [np.inf, np.inf, 3.0]
    try:
        if with_d:
            p, _ = curve_fit(
                _with_curvature, (t, k), nmad, p0=[*p0, 0.0], sigma=1 / np.sqrt(counts),
                bounds=([*low, 0.0], [*high, np.inf]), maxfev=10_000,
            )  # fmt: skip
            return SigmaModel(float(p[0]), float(p[1]), float(p[2]), float(p[3]))
        p, _ = curve_fit(
            lambda s, a, b, c: a + b * s**c, t, nmad, p0=p0, sigma=1 / np.sqrt(counts),
            bounds=(low, high), maxfev=10_000,
        )  # fmt: skip
    except (RuntimeError, ValueError):
        return constant
    return SigmaModel(float(p[0]), float(p[1]), float(p[2]))


def cell_means(sums: NDArray[np.float64], key: int, n: float) -> tuple[float, float]:
    """Mean slope and |curvature| of a joint cell, rounded to ROUND decimals: sums taken in
    another tile order differ in their last bits, and the rounded means do not (so a re-check
    that carries tiles over fits the same model as a fresh run)."""
    return round(float(sums[0, key]) / n, ROUND), round(float(sums[1, key]) / n, ROUND)


def joint_cells(
    bins: Mapping[int, DhSummary], sums: NDArray[np.float64]
) -> dict[str, NDArray[np.float64]]:
    """Per joint (slope x curvature) cell holding MIN_BIN_COUNT pixels: mean slope, mean
    |curvature|, NMAD and count (arrays)."""
    rows = []
    for key in sorted(bins):
        stats = dh_summary.statistics(bins[key])
        n = int(stats["count"] or 0)
        if n >= MIN_BIN_COUNT and stats["nmad"] is not None:
            rows.append((*cell_means(sums, key, n), float(stats["nmad"]), float(n)))
    table = np.array(rows, dtype=np.float64).reshape(-1, 4)
    return {
        "slope": table[:, 0],
        "curvature": table[:, 1],
        "nmad": table[:, 2],
        "count": table[:, 3],
    }


def fit_joint(bins: Mapping[int, DhSummary], sums: NDArray[np.float64]) -> SigmaModel:
    """fit_sigma on the joint cells (a NaN model when no cell is large enough)."""
    cells = joint_cells(bins, sums)
    if cells["count"].size == 0:
        return SigmaModel(float("nan"), 0.0, 1.0)
    return fit_sigma(cells["slope"], cells["nmad"], cells["count"], cells["curvature"])


def curvature_levels(
    bins: Mapping[int, DhSummary], sums: NDArray[np.float64]
) -> NDArray[np.float64]:
    """Mean |curvature| of the stable pixels of each curvature bin (the bin's middle, or 1.5 x
    the open bin's lower edge, where it has none), and 0 for pixels with no curvature."""
    counts = np.zeros(N_CURVATURE)
    for key, s in bins.items():
        counts[key % N_CURVATURE] += s.count
    total = sums[1].reshape(-1, N_CURVATURE).sum(axis=0)
    edges = np.asarray(CURVATURE_EDGES, dtype=np.float64)
    fallback = np.r_[0.5 * (edges[:-1] + edges[1:]), 1.5 * edges[-1]]
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(counts > 0, np.round(total / np.maximum(counts, 1), ROUND), fallback)
    return np.r_[mean, 0.0]


def bin_table(
    bins: Mapping[int, DhSummary],
    edges: Sequence[float],
    model: Any,
    *,
    centre_key: str = "centre",
) -> list[dict[str, Any]]:
    """Rows of low, high, centre, count, median, NMAD and ``model_m`` (model(key, centre))."""
    rows = []
    for k in sorted(bins):
        stats = dh_summary.statistics(bins[k])
        lo, hi = float(edges[k]), float(edges[k + 1])
        centre = 0.5 * (lo + hi) if np.isfinite(hi) else lo
        rows.append(
            {
                "low": lo,
                "high": hi,
                centre_key: centre,
                "count": int(stats["count"] or 0),
                "median": stats["median"],
                "nmad": stats["nmad"],
                "model_m": float(model(k, centre)),
            }
        )
    return rows


def marginal_model(
    sigma: SigmaModel,
    joint: Mapping[int, DhSummary],
    sums: NDArray[np.float64],
    *,
    by: str,
) -> Any:
    """model(key, centre) for bin_table: the model averaged over the pixels of a slope bin
    (by='slope') or curvature bin (by='curvature'), from the joint cells' mean slope and
    curvature; at the bin centre (and no curvature) where the bin has no joint cell."""
    total: dict[int, float] = {}
    weight: dict[int, float] = {}
    for key, s in joint.items():
        n = float(s.count)
        value = float(sigma(*cell_means(sums, key, n)))
        own = key // N_CURVATURE if by == "slope" else key % N_CURVATURE
        total[own] = total.get(own, 0.0) + n * value
        weight[own] = weight.get(own, 0.0) + n

    def model(key: int, centre: float) -> float:
        if weight.get(key):
            return total[key] / weight[key]
        return float(sigma(centre, 0.0) if by == "slope" else sigma(0.0, centre))

    return model
