"""The fitted error model (pure): sigma_dh(slope, curvature) on the merged bins
(workers/uncertainty/sigma.py), dh standardised by it, the empirical variogram of the standardised
samples and its spherical fit (workers/uncertainty/variogram.py); and the summary.json section."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.uncertainty.accumulate import ErrorModelAccumulator
from demaudit.workers.uncertainty.sigma import (
    CURVATURE_TABLE_EDGES,
    MIN_BIN_COUNT,
    SLOPE_TABLE_EDGES,
    SigmaModel,
    bin_table,
    curvature_levels,
    fit_joint,
    marginal_model,
)
from demaudit.workers.uncertainty.variogram import (
    EmpiricalVariogram,
    VariogramModel,
    empirical_variogram,
    fit_variogram,
)

SIGMA_TEXT = (
    "sigma_dh = a + b * tan(slope)^c + d * |curvature|, fitted to the NMAD of stable dh per "
    f"(slope bin x curvature bin) cell at its mean slope and |curvature| (weights sqrt(count); "
    f"cells under {MIN_BIN_COUNT} pixels left out)"
)
CURVATURE_TEXT = (
    "|z_xx + z_yy| x 100 of the reference (1/m x 100; the magnitude of Zevenbergen & Thorne's "
    "1987 curvature)"
)


@dataclass(frozen=True)
class FittedErrorModel:
    """The fitted model and what it was fitted on."""

    sigma: SigmaModel
    variogram: VariogramModel
    empirical: EmpiricalVariogram
    sigma_table: list[dict[str, Any]]
    curvature_table: list[dict[str, Any]]
    curvature_levels: tuple[float, ...]  # |curvature| standing for each curvature key
    centre_m: float  # median of the sampled stable dh (subtracted before standardising)
    samples: int
    tiles: int
    stable: int
    outside_limits: int
    max_distance_m: float
    seed: int
    pixel_area_m2: float

    def standardise(
        self, dh: NDArray[np.floating], slope_deg: NDArray[np.floating], curvature: Any
    ) -> NDArray[np.float64]:
        """z = (dh - centre) / sigma_dh(slope, curvature)."""
        return (np.asarray(dh, np.float64) - self.centre_m) / self.sigma(  # type: ignore[no-any-return]
            np.asarray(slope_deg, np.float64), curvature
        )

    def document(self) -> dict[str, Any]:
        """The summary.json ``error_model`` section."""
        v = self.variogram.to_dict()
        s = self.sigma
        coefficients = {"a_m": s.a, "b_m": s.b, "c": s.c, "d_m": s.d}
        return {
            "stable_terrain": "valid pixels of non-vegetated classes (all without land cover), "
            "within each tile's outlier limits (the spec's rule and factor on the tile's stable "
            "pixels)",
            "stable_pixels": self.stable,
            "outside_limits": self.outside_limits,
            "tiles": self.tiles,
            "samples": self.samples,
            "seed": self.seed,
            "max_distance_m": self.max_distance_m,
            "sigma_model": {"model": SIGMA_TEXT, "curvature": CURVATURE_TEXT, **coefficients},
            "sigma_by_slope": {
                "model": SIGMA_TEXT,
                **coefficients,
                "model_m": "the model averaged over each bin's stable pixels",
                "bins": self.sigma_table,
            },
            "sigma_by_curvature": {
                "curvature": CURVATURE_TEXT,
                "model_m": "the model averaged over each bin's stable pixels",
                "bins": self.curvature_table,
            },
            "standardised": "z = (dh - centre_m) / sigma_dh(slope, curvature), centre_m the "
            "median of the sampled stable dh",
            "centre_m": self.centre_m,
            "components": v["components"],
            "nugget": v["nugget"],
            "total_sill": v["total_sill"],
            "fit": v["fit"],
            "empirical_variogram": self.empirical.to_dict(),
        }


def fit_error_model(
    acc: ErrorModelAccumulator, *, max_distance_m: float, seed: int
) -> FittedErrorModel:
    """Fit sigma(slope, curvature) on the merged bins, standardise the samples, fit the
    variogram."""
    sigma = fit_joint(acc.joint_bins, acc.joint_sums)
    pts = acc.samples()
    centre = float(np.median(pts[:, 2])) if len(pts) else 0.0
    z = (pts[:, 2] - centre) / sigma(pts[:, 3], pts[:, 4]) if len(pts) else np.zeros(0)
    step = float(np.sqrt(acc.pixel_area_m2)) if acc.pixel_areas else 1.0
    empirical = empirical_variogram(
        pts[:, 0],
        pts[:, 1],
        z,
        min_distance_m=min(step * 1.5, max_distance_m / 2),
        max_distance_m=max_distance_m,
        seed=seed,
    )
    by = {
        k: marginal_model(sigma, acc.joint_bins, acc.joint_sums, by=k)
        for k in ("slope", "curvature")
    }
    return FittedErrorModel(
        sigma=sigma,
        variogram=fit_variogram(empirical),
        empirical=empirical,
        sigma_table=bin_table(
            acc.slope_bins, SLOPE_TABLE_EDGES, by["slope"], centre_key="centre_deg"
        ),
        curvature_table=bin_table(acc.curvature_bins, CURVATURE_TABLE_EDGES, by["curvature"]),
        curvature_levels=tuple(float(v) for v in curvature_levels(acc.joint_bins, acc.joint_sums)),
        centre_m=centre,
        samples=len(pts),
        tiles=acc.tiles,
        stable=acc.stable,
        outside_limits=acc.outside_limits,
        max_distance_m=max_distance_m,
        seed=seed,
        pixel_area_m2=acc.pixel_area_m2,
    )
