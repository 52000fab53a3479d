"""A tile's summaries from its layers: dh per area and stratum (one keyed pass), the dh overview,
and the extras the job asks for (error-model sample, derived parameters)."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import replace

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.inputs.regions import Region, region_mask
from demaudit.workers.tile.derivative_pass import TileDerivatives, tile_derivatives
from demaudit.workers.tile.difference import block_mean
from demaudit.workers.tile.one_pass import ALL, summarise_pixels
from demaudit.workers.tile.records import OK, TileOptions, TileResult, TileSurfaces
from demaudit.workers.tile.strata import excluded_mask
from demaudit.workers.uncertainty.error_model import grid_error_sample


def without_pixels(layers: TileSurfaces, hidden: NDArray[np.bool_] | None) -> TileSurfaces:
    """layers with dh and the test heights set to NaN where ``hidden`` (None: unchanged)."""
    if hidden is None:
        return layers
    test_heights = None if layers.test is None else np.where(hidden, np.nan, layers.test)
    return replace(layers, dh=np.where(hidden, np.nan, layers.dh), test=test_heights)


def summarise_tile(
    test: TileInfo,
    layers: TileSurfaces,
    regions: Sequence[Region],
    options: TileOptions,
    *,
    reference_tiles: tuple[str, ...] = (),
    derived: bool = True,
) -> TileResult:
    """Summaries of dh for the tile, each region, and each region x stratum (one pass over the
    valid pixels: workers/tile/one_pass.py); with options.derivatives and ``derived``, the
    comparison of derived parameters (workers/tile/derivative_pass.py)."""
    dh = layers.dh
    px, py = test.grid.pixel_size_m()
    masks = {r.region_id: region_mask(r, test.grid) for r in regions}
    found = summarise_pixels(
        dh,
        reference=layers.reference,
        landcover=layers.landcover,
        region_masks=masks,
        classes=options.landcover_classes,
        slope_edges=options.slope_edges_deg,
        pixel_size_m=(px, py),
    )
    dh_valid = dh
    excluded = None
    if found.excluded:
        excluded = excluded_mask(layers.landcover, options.landcover_classes)
    if excluded is not None:
        dh_valid = np.where(excluded, np.nan, dh)
    per_area = found.areas
    return TileResult(
        tile_id=test.tile_id,
        status=OK,
        reason=None,
        summary=per_area.pop(ALL),
        regions=per_area,
        strata=found.strata,
        excluded=found.excluded,
        overview=block_mean(dh_valid, options.overview_factor),
        reference_tiles=reference_tiles,
        error_sample=grid_error_sample(
            test.grid,
            test.tile_id,
            dh,
            layers.reference,
            layers.landcover,
            masks,
            options.landcover_classes,
            options.error_model,
        ),  # fmt: skip
        derivatives=_derivatives(layers, masks, options, (px, py)) if derived else None,
    )


def _derivatives(
    layers: TileSurfaces,
    masks: dict[str, NDArray[np.bool_]],
    options: TileOptions,
    pixel_size_m: tuple[float, float],
) -> TileDerivatives | None:
    """The comparison of derived parameters when the job asks for it (derivative_pass)."""
    if options.derivatives is None or layers.test is None:
        return None
    return tile_derivatives(
        layers.test,
        layers.reference,
        landcover=layers.landcover,
        region_masks=masks,
        classes=options.landcover_classes,
        slope_edges=options.slope_edges_deg,
        pixel_size_m=pixel_size_m,
        options=options.derivatives,
        overview_factor=options.overview_factor,
    )
