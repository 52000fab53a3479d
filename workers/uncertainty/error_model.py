"""Error model of dh on stable terrain: spread by slope and curvature, spatial correlation,
standard errors of regional figures. One pass over the tiles, bounded memory, reproducible from
the spec's seed. The pieces, in the order a job uses them:

* workers/uncertainty/sample.py: a tile's contribution on the workers (stable terrain, binned
  summaries, seeded sample of pixels, per-area counts, terrain overview);
* workers/uncertainty/accumulate.py: the running merge on the client (bounded);
* workers/uncertainty/sigma.py: sigma_dh(slope, curvature) fitted to the binned NMADs;
* workers/uncertainty/model.py: the fitted model (sigma, standardised dh, variogram fit by
  workers/uncertainty/variogram.py) and the summary.json ``error_model`` section;
* workers/uncertainty/areas.py: standard errors of regions and strata (Rolstad et al. 2009);
* this module: :func:`attach_error_model`, what the job runner calls, and the public names.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from demaudit.workers.tile.strata import ClassInfo
from demaudit.workers.uncertainty.accumulate import ErrorModelAccumulator, common_metric
from demaudit.workers.uncertainty.areas import (
    METHOD,
    area_uncertainty,
    mean_sigma2,
    stratum_counts,
    with_uncertainty,
)
from demaudit.workers.uncertainty.model import FittedErrorModel, fit_error_model
from demaudit.workers.uncertainty.sample import (
    CURVATURE_EDGES,
    CURVATURE_KEYS,
    DEGREE_BINS,
    SLOPE_EDGES_DEG,
    ErrorModelOptions,
    TileErrorSample,
    abs_curvature,
    grid_error_sample,
    tile_error_sample,
)
from demaudit.workers.uncertainty.sigma import SigmaModel, fit_sigma

__all__ = [
    "CURVATURE_EDGES",
    "CURVATURE_KEYS",
    "DEGREE_BINS",
    "METHOD",
    "SLOPE_EDGES_DEG",
    "ErrorModelAccumulator",
    "ErrorModelOptions",
    "FittedErrorModel",
    "SigmaModel",
    "TileErrorSample",
    "abs_curvature",
    "area_uncertainty",
    "attach_error_model",
    "common_metric",
    "fit_error_model",
    "fit_sigma",
    "grid_error_sample",
    "mean_sigma2",
    "stratum_counts",
    "tile_error_sample",
    "with_uncertainty",
]


def attach_error_model(
    errors: ErrorModelAccumulator,
    *,
    max_distance_m: float,
    seed: int,
    overall: dict[str, Any],
    regions: list[dict[str, Any]],
    with_landcover: bool,
    classes: Sequence[ClassInfo],
    slope_edges: Sequence[float],
) -> tuple[dict[str, Any], dict[str, Any], list[dict[str, Any]]]:
    """Fit the model and give the summary.json section, the overall entry and the region
    entries with their ``uncertainty`` (see with_uncertainty)."""
    model = fit_error_model(errors, max_distance_m=max_distance_m, seed=seed)
    layout: dict[str, Any] = {
        "with_landcover": with_landcover,
        "classes": classes,
        "slope_edges": slope_edges,
    }
    overall = with_uncertainty(overall, model, errors.counts.get("*"), **layout)
    regions = [
        with_uncertainty(r, model, errors.counts.get(r["region"]), **layout) for r in regions
    ]
    return model.document(), overall, regions
