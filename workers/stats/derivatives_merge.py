"""Merge the tiles' derived-parameter comparisons (workers/tile/derivative_pass.py) into the job's
``derivatives`` section of summary.json (pure).

Each parameter's difference summaries merge exactly like dh's (one JobAccumulator per
parameter: histograms added, moments independent of tile order), so the job, each region and each
stratum get the statistics of all their pixels together, with dh's statistics keys. D8 agreement
merges as integer counts (agreeing, compared) per area.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.stats.merge import JobAccumulator
from demaudit.workers.stats.summary import DhSummary
from demaudit.workers.tile.derivative_pass import (
    EDGE_CAUTION,
    FLOW_DIRECTION,
    SUMMARY_SCALE,
    DerivativeOptions,
    TileDerivatives,
)
from demaudit.workers.tile.derivatives import UNITS
from demaudit.workers.tile.one_pass import ALL
from demaudit.workers.tile.task import OK, TileResult

METHOD = {
    "slope_aspect": "Horn (1981) weighted 3 x 3 differences; aspect = downslope direction, "
    "degrees clockwise from north",
    "curvature": "Zevenbergen & Thorne (1987) 3 x 3 derivatives; profile = normal curvature "
    "along the steepest slope, plan = contour curvature; positive = convex",
    "flow_direction": "D8: the neighbour of steepest descent; agreement = share of pixels with "
    "the same direction (or both without a lower neighbour)",
    "differences": "test minus reference on the test grid; aspect wrapped to (-180, 180] "
    "degrees; aspect and plan curvature only where the reference slope exceeds min_slope_deg",
}


class DerivativesAccumulator:
    """Running merge of the tiles' TileDerivatives."""

    def __init__(self, options: DerivativeOptions, *, region_ids: Sequence[str] = ()) -> None:
        self.options = options
        self.region_ids = list(region_ids)
        self.merged = {p: JobAccumulator(region_ids=region_ids) for p in options.compared}
        self.d8: dict[str, list[int]] = {}
        self.tiles = 0

    def add(self, tile_id: str, found: TileDerivatives | None) -> None:
        """Fold one tile's comparison in (None: the tile had none, e.g. it failed)."""
        if found is None:
            return
        self.tiles += 1
        for name, summaries in found.summaries.items():
            areas = dict(summaries.areas)
            whole = areas.pop(ALL)
            self.merged[name].add(
                TileResult(tile_id, OK, None, whole, areas, summaries.strata, summaries.excluded)
            )
        for area, (agree, compared) in found.d8.items():
            counts = self.d8.setdefault(area, [0, 0])
            counts[0] += agree
            counts[1] += compared

    def section(self, names: Mapping[str, str]) -> dict[str, Any]:
        """summary.json's ``derivatives``: method, units and, per parameter, overall and
        per-region statistics (dh's keys) with their strata; ``d8_agreement`` per area."""
        out: dict[str, Any] = {
            "method": METHOD,
            "units": {p: UNITS[p] for p in self.options.compared},
            "min_slope_deg": self.options.min_slope_deg,
            "edges": EDGE_CAUTION,
            "tiles": self.tiles,
        }
        for name, acc in self.merged.items():
            scale = SUMMARY_SCALE[name]
            out[name] = {
                "unit": UNITS[name],
                "bin_width": dh_summary.LINEAR_WIDTH_M * scale,
                "overall": _area(acc.overall, acc.strata_of(ALL), scale),
                "regions": [
                    {"region": r, "name": names.get(r, r)}
                    | _area(acc.summary((r, "")), acc.strata_of(r), scale)
                    for r in self.region_ids
                ],
            }
        if FLOW_DIRECTION in self.options.parameters:
            out["d8_agreement"] = {
                "overall": agreement(*self.d8.get(ALL, (0, 0))),
                "regions": [
                    {"region": r, "name": names.get(r, r)} | agreement(*self.d8.get(r, (0, 0)))
                    for r in self.region_ids
                ],
            }
        return out


def _area(s: DhSummary, strata: Mapping[str, DhSummary], scale: float) -> dict[str, Any]:
    return {
        "stats": statistics(s, scale),
        "strata": [{"stratum": k, "stats": statistics(v, scale)} for k, v in strata.items()],
    }


def statistics(s: DhSummary, scale: float) -> dict[str, Any]:
    """dh's statistics of a summary held in units of ``scale`` (SUMMARY_SCALE), in the
    parameter's own units: every statistic but the count is linear in the unit."""
    return {
        key: value * scale if key != "count" and value is not None else value
        for key, value in dh_summary.statistics(s).items()
    }


def agreement(agree: int, compared: int) -> dict[str, Any]:
    """D8 agreement of one area: the counts and their share (None when nothing was compared)."""
    return {"agree": agree, "compared": compared, "share": agree / compared if compared else None}


def tile_entry(found: TileDerivatives | None) -> dict[str, Any] | None:
    """A tile record's ``derivatives``: each parameter's statistics over the tile, and its D8
    agreement."""
    if found is None:
        return None
    entry: dict[str, Any] = {
        name: statistics(s.areas[ALL], SUMMARY_SCALE[name]) for name, s in found.summaries.items()
    }
    if ALL in found.d8:
        entry["d8_agreement"] = agreement(*found.d8[ALL])
    return entry


def derivative_cautions(section: Mapping[str, Any] | None) -> list[str]:
    """Cautions for summary.json when derivatives were compared."""
    if not section:
        return []
    return [
        EDGE_CAUTION,
        "derived parameters are compared on the uncorrected surfaces (before any co-registration)",
    ]
