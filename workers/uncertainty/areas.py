"""Standard errors of regional figures from the fitted error model (pure).

The standard error of an area's mean dh is that of Rolstad, Haug & Denby (2009, see
workers/uncertainty/variogram.py) for the standardised dh, scaled by the area's mean
sigma_dh(slope, curvature)^2 (from its pixels' counts per class x 1-degree slope bin x curvature
bin); that of its median is sqrt(pi/2) x that (an approximation for normal errors).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.tile.strata import ClassInfo, stratum_cells
from demaudit.workers.uncertainty.model import FittedErrorModel
from demaudit.workers.uncertainty.sample import DEGREE_BINS
from demaudit.workers.uncertainty.variogram import mean_variance

MEDIAN_SE_FACTOR = float(np.sqrt(np.pi / 2))  # SE(median) / SE(mean) for normal errors
NMAD_SE_FACTOR = 1.1664  # SE(NMAD) x sqrt(n) / sigma for normal errors (asymptotic; from memory)
METHOD = (
    "Rolstad, Haug & Denby (2009): the fitted spherical components averaged over a disc of the "
    "area's size (L = sqrt(A/pi)) plus nugget/N, times the area's mean sigma_dh(slope, "
    "curvature)^2; a scattered area or stratum is treated as one compact area (conservative). "
    "sigma_dh and the correlation are those of stable terrain: where vegetation or roofs add "
    "spread (and their own correlation) the true standard error is larger. median_se_m = "
    "sqrt(pi/2) x mean_se_m and nmad_se_m = 1.166 x sigma / sqrt(effective_pixels): "
    "approximations for normal errors."
)


def mean_sigma2(counts: NDArray[np.int64], model: FittedErrorModel) -> tuple[float, int]:
    """Count-weighted mean sigma_dh^2 over a (class code, degree, curvature key) or (degree,
    curvature key) count table (pixels with no slope take the flat-ground sigma, those with no
    curvature none), and the number of pixels."""
    per_cell = counts.sum(axis=0) if counts.ndim == 3 else counts
    n = int(per_cell.sum())
    if n == 0:
        return float("nan"), 0
    centres = np.r_[np.arange(90) + 0.5, 0.0]
    levels = np.asarray(model.curvature_levels, dtype=np.float64)
    s2 = np.asarray(model.sigma(centres[:, None], levels[None, :])) ** 2
    return float(np.sum(per_cell * s2) / n), n


def area_uncertainty(
    model: FittedErrorModel, counts: NDArray[np.int64] | None, *, n_pixels: int
) -> dict[str, Any]:
    """``uncertainty`` of one area: standard errors of its mean and median dh (see module)."""
    none = {"mean_se_m": None, "median_se_m": None, "method": "not available"}
    if counts is None or n_pixels <= 0 or not np.isfinite(model.variogram.nugget):
        return none
    s2, n = mean_sigma2(counts, model)
    if n == 0 or not np.isfinite(s2):
        return none
    area = n * model.pixel_area_m2
    variance = s2 * mean_variance(model.variogram, n=n, area_m2=area)
    se = float(np.sqrt(variance))
    n_eff = s2 / variance if variance > 0 else float(n)
    return {
        "mean_se_m": se,
        "median_se_m": MEDIAN_SE_FACTOR * se,
        "nmad_se_m": NMAD_SE_FACTOR * float(np.sqrt(s2)) / float(np.sqrt(max(n_eff, 1.0))),
        "effective_pixels": n_eff,
        "area_km2": area / 1e6,
        "mean_sigma_m": float(np.sqrt(s2)),
        "independent_pixels_mean_se_m": float(np.sqrt(s2 / n)),
        "method": METHOD,
    }


def stratum_counts(
    counts: NDArray[np.int64],
    *,
    with_landcover: bool,
    classes: Sequence[ClassInfo],
    slope_edges: Sequence[float],
) -> dict[str, NDArray[np.int64]]:
    """Each stratum's (degree[, curvature key]) counts from an area's (class code, degree[,
    curvature key]) table, the strata being those of workers/strata.py (a degree bin counts in
    the slope band holding its lower edge: exact for whole-degree band edges)."""
    layout = stratum_cells(with_landcover=with_landcover, classes=classes, slope_edges=slope_edges)
    edges = np.asarray(slope_edges, dtype=np.float64)
    band_of_degree = np.r_[np.searchsorted(edges, np.arange(90), side="right") - 1, layout.n_bands]
    band_of_degree[band_of_degree < 0] = layout.n_bands
    trailing = (1,) * (counts.ndim - 2)
    out = {}
    for name, cells in layout.strata.items():
        total = np.zeros(counts.shape[1:], dtype=np.int64)
        for cell in cells:
            code, band = divmod(cell, layout.n_bands + 1)
            if code < counts.shape[0]:
                in_band = (band_of_degree == band).reshape(DEGREE_BINS, *trailing)
                total += np.where(in_band, counts[code], 0)
        out[name] = total
    return out


def with_uncertainty(
    entry: dict[str, Any],
    model: FittedErrorModel,
    counts: NDArray[np.int64] | None,
    *,
    with_landcover: bool,
    classes: Sequence[ClassInfo],
    slope_edges: Sequence[float],
) -> dict[str, Any]:
    """An area entry of the summary document (stats, confidence_95, strata) with
    ``uncertainty`` for the area and each stratum; its order-statistic intervals labelled
    'independent pixels'."""
    out = dict(entry)
    out["uncertainty"] = _interval(
        area_uncertainty(model, counts, n_pixels=int(entry["stats"].get("count") or 0)),
        entry["stats"],
    )
    if "confidence_95" in out:
        out["confidence_95"] = dict(out["confidence_95"]) | {"label": "independent pixels"}
    per_stratum = (
        stratum_counts(
            counts, with_landcover=with_landcover, classes=classes, slope_edges=slope_edges
        )
        if counts is not None
        else {}
    )
    out["strata"] = [
        s
        | {
            "uncertainty": _interval(
                area_uncertainty(
                    model, per_stratum.get(s["stratum"]), n_pixels=int(s["stats"].get("count") or 0)
                ),
                s["stats"],
            )
        }
        for s in entry.get("strata", [])
    ]
    return out


def _interval(u: dict[str, Any], stats: Mapping[str, Any]) -> dict[str, Any]:
    """u with 95 % intervals of the mean and median (value +- 1.96 SE)."""
    for key, se_key in (("mean", "mean_se_m"), ("median", "median_se_m")):
        value, se = stats.get(key), u.get(se_key)
        if value is not None and se is not None:
            u[f"{key}_95_m"] = [value - 1.959964 * se, value + 1.959964 * se]
    return u
