"""One tile's derived-parameter comparison: the summaries of test - reference of each derived
parameter (workers/tile/derivatives.py) per tile, region, land-cover class and slope band, and
the D8 flow-direction agreement per area as counts (pure).

The differences are summarised by the same keyed pass as dh (workers/tile/one_pass.py), so they
carry the same mergeable summaries and the same area and stratum keys (slope band of the
reference). Pixels of an excluded land-cover class leave every statistic, as for dh.

Scale: the summaries' bins are made for dh in metres (0.2 mm wide within +-2, then 0.01 %
relative), so each difference is summarised in units of SUMMARY_SCALE[name] of its UNITS, which
puts its usual range in the fine linear bins (and keeps the pass as fast as dh's): bins of
0.002 degrees of slope within +-20, 0.02 degrees of aspect within +-200, 0.02 1/km of curvature
within +-200. Statistics read from them are multiplied back (workers/stats/derivatives_merge.py).

Edges: the tile pass reads no halo around a test tile, so the outermost row and column of each
tile (and every pixel whose 3 x 3 window holds a missing height) have no derived value and are
left out; summary.json says so in its cautions (EDGE_CAUTION).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.spec import Derivatives
from demaudit.workers.tile.derivatives import (
    ASPECT,
    PARAMETERS,
    PLAN_CURVATURE,
    PROFILE_CURVATURE,
    SLOPE,
    d8_compared,
    derived_differences,
    surface_derivatives,
)
from demaudit.workers.tile.difference import block_mean
from demaudit.workers.tile.one_pass import ALL, TileSummaries, summarise_pixels
from demaudit.workers.tile.strata import ClassInfo, excluded_mask

FLOW_DIRECTION = "flow_direction"
#: Each difference is summarised in units of this many of its UNITS (see the module docstring).
SUMMARY_SCALE = {SLOPE: 10.0, ASPECT: 100.0, PLAN_CURVATURE: 100.0, PROFILE_CURVATURE: 100.0}
EDGE_CAUTION = (
    "derived parameters (slope, aspect, curvature, D8) need a full 3 x 3 window: the outermost "
    "row and column of each test tile (no halo is read across tile edges) and pixels next to "
    "missing heights are left out of the derivatives section"
)


@dataclass(frozen=True)
class DerivativeOptions:
    """What a worker needs to compare derived parameters (the spec's ``derivatives`` section):
    which parameters (PARAMETERS and/or FLOW_DIRECTION), and the reference slope (degrees)
    above which aspect and plan curvature are compared."""

    parameters: tuple[str, ...] = (*PARAMETERS, FLOW_DIRECTION)
    min_slope_deg: float = 5.0

    @classmethod
    def from_section(cls, section: Derivatives | None) -> DerivativeOptions | None:
        """The options of the spec's ``derivatives`` section; None without one."""
        if section is None:
            return None
        return cls(tuple(section.parameters), section.min_slope_deg)

    @property
    def compared(self) -> tuple[str, ...]:
        """The parameters whose differences are summarised (all but flow direction)."""
        return tuple(p for p in self.parameters if p != FLOW_DIRECTION)


@dataclass(frozen=True, eq=False)
class TileDerivatives:
    """One tile's derived comparison: per parameter, its TileSummaries (areas: ALL and each
    region; values in units of SUMMARY_SCALE[name]); per area, D8 (agreeing, compared) pixel
    counts (empty without flow direction); per parameter, the block mean of the differences
    (in UNITS, on the dh overview's grid)."""

    summaries: dict[str, TileSummaries]
    d8: dict[str, tuple[int, int]]
    overviews: dict[str, NDArray[np.float32]]


def tile_derivatives(
    test: NDArray[np.floating],
    reference: NDArray[np.floating],
    *,
    landcover: NDArray[np.float64] | None,
    region_masks: Mapping[str, NDArray[np.bool_]],
    classes: Sequence[ClassInfo],
    slope_edges: Sequence[float],
    pixel_size_m: tuple[float, float],
    options: DerivativeOptions,
    overview_factor: int,
) -> TileDerivatives:
    """Compare the derived parameters of test and reference heights (metres, one grid and
    datum, NaN = none; pixel_size_m = (east, north) pixel sides)."""
    px, py = pixel_size_m
    of_test = surface_derivatives(test, pixel_size_x_m=px, pixel_size_y_m=py)
    of_reference = surface_derivatives(reference, pixel_size_x_m=px, pixel_size_y_m=py)
    differences = derived_differences(
        of_test, of_reference, parameters=options.compared, min_slope_deg=options.min_slope_deg
    )
    summaries: dict[str, TileSummaries] = {}
    overviews: dict[str, NDArray[np.float32]] = {}
    for name, values in differences.items():
        summaries[name] = summarise_pixels(
            values / SUMMARY_SCALE[name],
            reference=reference,
            landcover=landcover,
            region_masks=region_masks,
            classes=classes,
            slope_edges=slope_edges,
            pixel_size_m=pixel_size_m,
        )
        overviews[name] = block_mean(values, overview_factor)
    d8: dict[str, tuple[int, int]] = {}
    if FLOW_DIRECTION in options.parameters:
        excluded = excluded_mask(landcover, classes)
        compared, agree = d8_compared(of_test, of_reference)
        d8 = d8_counts(compared, agree, region_masks, excluded)
    return TileDerivatives(summaries, d8, overviews)


def d8_counts(
    compared: NDArray[np.bool_],
    agree: NDArray[np.bool_],
    region_masks: Mapping[str, NDArray[np.bool_]],
    excluded: NDArray[np.bool_] | None,
) -> dict[str, tuple[int, int]]:
    """(agreeing, compared) pixel counts for the tile (ALL) and each region; pixels of excluded
    land-cover classes are not counted."""
    if excluded is not None:
        compared = compared & ~excluded
        agree = agree & ~excluded
    counts = {ALL: (int(np.count_nonzero(agree)), int(np.count_nonzero(compared)))}
    for region_id, mask in region_masks.items():
        counts[region_id] = (
            int(np.count_nonzero(agree & mask)),
            int(np.count_nonzero(compared & mask)),
        )
    return counts
