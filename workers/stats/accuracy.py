"""Accuracy measures of a small set of residuals, exactly (pure; for checkpoints).

dh = test - reference (metres). Gaussian measures follow the published relations for normally
distributed errors; robust ones follow Höhle & Höhle (2009):

* RMSE_z = sqrt(mean(dh^2)); NSSDA Accuracy_z = 1.9600 RMSE_z (FGDC-STD-007.3-1998);
* NVA (ASPRS 2014): 1.96 RMSE_z of non-vegetated checkpoints; VVA: the 95th percentile of |dh| of
  vegetated checkpoints (Edition 1); ASPRS Edition 2 reports the vegetated RMSE_z instead;
* LE90: ``le90_gaussian`` = 1.6449 RMSE_z is the 90 % linear error only for normal errors with
  mean zero (computed from the normal distribution); ``le90_empirical`` is the 90th percentile of
  |dh| itself (numpy.quantile, linear). ``le90`` repeats ``le90_gaussian`` for readers of earlier
  outputs.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

NSSDA_FACTOR = 1.9600  # FGDC-STD-007.3-1998: Accuracy_z = 1.9600 x RMSE_z
NVA_FACTOR = 1.96  # ASPRS 2014: NVA at the 95 % confidence level = 1.96 x RMSE_z
LE90_FACTOR = 1.6449  # normal quantile 0.95 (two-sided 90 %)
NMAD_FACTOR = 1.4826


def residual_statistics(dh: ArrayLike) -> dict[str, Any]:
    """count, mean, std (n - 1), rmse, median, nmad, q683_abs, q95_abs, min, max, the Gaussian
    equivalents accuracy_z_95 (NSSDA) and le90_gaussian (le90: the same, kept for earlier
    readers), and le90_empirical (90th percentile of |dh|); None when there are no residuals."""
    x = np.asarray(dh, dtype=np.float64)
    x = x[np.isfinite(x)]
    keys = (
        "mean",
        "std",
        "rmse",
        "median",
        "nmad",
        "q683_abs",
        "q95_abs",
        "min",
        "max",
        "accuracy_z_95",
        "le90_gaussian",
        "le90_empirical",
        "le90",
    )
    if x.size == 0:
        return {"count": 0} | {k: None for k in keys}
    rmse = float(np.sqrt(np.mean(x**2)))
    median = float(np.median(x))
    return {
        "count": int(x.size),
        "mean": float(x.mean()),
        "std": float(x.std(ddof=1)) if x.size > 1 else 0.0,
        "rmse": rmse,
        "median": median,
        "nmad": float(NMAD_FACTOR * np.median(np.abs(x - median))),
        "q683_abs": float(np.quantile(np.abs(x), 0.683)),
        "q95_abs": float(np.quantile(np.abs(x), 0.95)),
        "min": float(x.min()),
        "max": float(x.max()),
        "accuracy_z_95": NSSDA_FACTOR * rmse,
        "le90_gaussian": LE90_FACTOR * rmse,
        "le90_empirical": float(np.quantile(np.abs(x), 0.90)),
        "le90": LE90_FACTOR * rmse,
    }


def vertical_accuracy(
    non_vegetated: ArrayLike, vegetated: ArrayLike
) -> dict[str, float | int | None]:
    """NVA (1.96 RMSE_z of non-vegetated residuals), VVA (95th percentile of |dh| of vegetated
    residuals, ASPRS Edition 1), the vegetated RMSE_z (ASPRS Edition 2's VVA) and the RMSE_z of
    both groups together, with the counts; None where a group is empty."""
    nv = np.asarray(non_vegetated, dtype=np.float64)
    veg = np.asarray(vegetated, dtype=np.float64)
    rmse_nv = _rmse(nv)
    return {
        "rmse_z_non_vegetated": rmse_nv,
        "nva_95": NVA_FACTOR * rmse_nv if rmse_nv is not None else None,
        "vva_95": float(np.quantile(np.abs(veg), 0.95)) if veg.size else None,
        "rmse_z_vegetated": _rmse(veg),
        "rmse_z_all": _rmse(np.concatenate([nv, veg])),
        "count_non_vegetated": int(nv.size),
        "count_vegetated": int(veg.size),
    }


def _rmse(x: NDArray[np.float64]) -> float | None:
    return float(np.sqrt(np.mean(x**2))) if x.size else None
