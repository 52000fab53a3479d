"""Assemble the JSON summary of a job (pure): statistics, tile statuses, bounds and cautions."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from workers import summary as dh_summary
from workers.summary import DhSummary

SIGN = "test minus reference"

CAUTIONS_ALWAYS = (
    "These statistics support, but do not replace, acceptance of the release under the contract's "
    "specification and local regulations, and the judgement of a licensed surveyor.",
    "dh compares the test model with the reference, which has errors of its own; the statistics "
    "describe their difference, and equal the test model's accuracy only where the reference is "
    "much more accurate.",
    "A surface model (canopy, roofs) compared with a bare-earth terrain model shows vegetation and "
    "buildings as positive dh; judge accuracy on open ground.",
)


def quantile_resolution() -> dict[str, Any]:
    """The stated accuracy of the robust statistics read from the mergeable summaries."""
    return {
        "median_q683_q95_m": f"max({dh_summary.LINEAR_WIDTH_M}, "
        f"{dh_summary.RELATIVE_WIDTH} * |value|)",
        "nmad_m": f"{dh_summary.NMAD_FACTOR} * ({dh_summary.LINEAR_WIDTH_M} + max("
        f"{dh_summary.LINEAR_WIDTH_M}, {dh_summary.RELATIVE_WIDTH} * (|median| + nmad / "
        f"{dh_summary.NMAD_FACTOR})))",
        "bin_width_m": dh_summary.LINEAR_WIDTH_M,
        "relative_bin_width_beyond_2m": dh_summary.RELATIVE_WIDTH,
        "count_mean_std_rmse_min_max": "exact",
    }


def region_entries(
    regions: Mapping[str, DhSummary], names: Mapping[str, str]
) -> list[dict[str, Any]]:
    """One entry per region, in the order given; an empty region says so."""
    entries = []
    for region_id, s in regions.items():
        entry: dict[str, Any] = {
            "region": region_id,
            "name": names.get(region_id, region_id),
            "stats": dh_summary.statistics(s),
        }
        if s.count == 0:
            entry["note"] = "no valid pixels: no overlap of test, reference and region"
        entries.append(entry)
    return entries


def build_summary(
    *,
    job: Mapping[str, Any],
    overall: DhSummary,
    regions: list[dict[str, Any]],
    tiles: Sequence[Mapping[str, Any]],
    reference_failures: Sequence[Mapping[str, str]],
    extra_cautions: Sequence[str] = (),
) -> dict[str, Any]:
    """The summary.json document."""
    failed = [t for t in tiles if t["status"] == "failed"]
    cautions = list(CAUTIONS_ALWAYS) + list(extra_cautions)
    if failed:
        cautions.append(f"{len(failed)} test tile(s) failed and are not in the statistics; "
                        "see tiles[].reason.")
    if reference_failures:
        cautions.append(f"{len(reference_failures)} reference tile(s) could not be read; test "
                        "pixels they would cover have no reference.")
    return {
        "job": dict(job),
        "sign": SIGN,
        "units": "metre",
        "quantile_resolution_m": quantile_resolution(),
        "overall": dh_summary.statistics(overall),
        "regions": regions,
        "tiles": list(tiles),
        "reference_failures": list(reference_failures),
        "cautions": cautions,
    }
