"""What a re-check takes from its baseline run (pure): the change plan from the baseline's
summary document, the tiles' shift estimates it may reuse, and the report of what changed.

The baseline's files are read by service/run/recheck.py (``Baseline``); these functions see only
its summary document and typed tile records.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from typing import Any

from demaudit.workers.coregistration.shift import ShiftEstimate
from demaudit.workers.outputs.tile_records import TileRecord
from demaudit.workers.recheck.plan import ChangePlan, Thresholds, compare, lost_grades, plan

#: Spec sections whose change forces every tile to be recomputed.
PROCESSING_KEYS = (
    "test",
    "reference",
    "region",
    "landcover",
    "strata",
    "options",
    "coregistration",
)


def tile_records(document: Mapping[str, Any]) -> dict[str, TileRecord]:
    """A summary document's tiles, by id."""
    return {t["tile"]: TileRecord.from_document(t) for t in document.get("tiles", [])}


def spec_changes(
    document: Mapping[str, Any], spec_dump: Mapping[str, Any], region_fingerprint: str | None
) -> list[str]:
    """The processing sections of the spec that differ from the baseline's, and 'region file
    content' when the region file's SHA-256 changed."""
    before = document.get("job", {}).get("spec", {})
    changed = [
        k for k in PROCESSING_KEYS if _canonical(before.get(k)) != _canonical(spec_dump.get(k))
    ]
    if document.get("job", {}).get("region_fingerprint") != region_fingerprint:
        changed.append("region file content")
    return changed


def change_plan(
    document: Mapping[str, Any],
    spec_dump: Mapping[str, Any],
    current: Mapping[str, str],
    sources: Mapping[str, str],
    overlaps: Mapping[str, Sequence[str]],
    *,
    region_fingerprint: str | None = None,
) -> ChangePlan:
    """The change plan against the baseline's document (current: test tile id -> fingerprint;
    sources and overlaps as recheck.plan.plan takes them); every tile is recomputed when the
    processing part of the spec, or the content of the region file, changed."""
    before_tiles = {t["tile"]: t for t in document.get("tiles", [])}
    changed = spec_changes(document, spec_dump, region_fingerprint)
    if changed:
        return ChangePlan(
            recompute={t: f"job spec changed ({', '.join(changed)})" for t in current},
            added=tuple(t for t in current if t not in before_tiles),
            removed=tuple(sorted(t for t in before_tiles if t not in current)),
        )
    return plan(
        baseline_tiles=before_tiles,
        baseline_sources=document.get("sources", {}),
        current_tiles=current,
        current_sources=sources,
        overlaps=overlaps,
    )


def known_shifts(tiles: Mapping[str, TileRecord], change: ChangePlan) -> dict[str, ShiftEstimate]:
    """The baseline's per-tile co-registration estimates of the tiles carried over."""
    return {
        tile_id: shift.before_audit()
        for tile_id in change.reuse
        if (shift := tiles[tile_id].coregistration) is not None
    }


def change_report(
    before: Mapping[str, Any],
    change: ChangePlan,
    after: Mapping[str, Any],
    limits: Thresholds,
    *,
    baseline: str,
) -> dict[str, Any]:
    """Tiles added, removed and recomputed with before/after figures; regions and grades.

    before, after: the baseline's and this run's summary documents; baseline: its folder."""
    tiles = _tile_changes(before, change, after, limits)
    regions = _region_changes(before, after, limits)
    grades = lost_grades(
        before.get("grading_indicative") or [], after.get("grading_indicative") or []
    )
    grades += lost_grades(_checkpoint_grades(before), _checkpoint_grades(after))
    regressions = sum(t["verdict"] == "regressed" for t in tiles + regions) + len(grades)
    return {
        "baseline": baseline,
        "baseline_finished": before.get("job", {}).get("finished"),
        "thresholds": limits.__dict__,
        "tiles_added": list(change.added),
        "tiles_removed": list(change.removed),
        "tiles_recomputed": sorted(change.recompute),
        "tiles_reused": len(change.reuse),
        "tiles": tiles,
        "regions": regions,
        "grades_lost": grades,
        "regressions": regressions,
    }


def _tile_changes(
    before: Mapping[str, Any], change: ChangePlan, after: Mapping[str, Any], limits: Thresholds
) -> list[dict[str, Any]]:
    before_tiles = {t["tile"]: t for t in before.get("tiles", [])}
    after_tiles = {t["tile"]: t for t in after["tiles"]}
    return [
        {"tile": tile_id, "why": why}
        | compare(
            before_tiles.get(tile_id, {}).get("stats"),
            after_tiles.get(tile_id, {}).get("stats"),
            limits,
        )
        for tile_id, why in sorted(change.recompute.items())
    ]


def _region_changes(
    before: Mapping[str, Any], after: Mapping[str, Any], limits: Thresholds
) -> list[dict[str, Any]]:
    before_regions = {r["region"]: r for r in before.get("regions", [])}
    return [
        {"region": r["region"]}
        | compare(
            before_regions.get(r["region"], {}).get("stats"),
            r["stats"],
            limits,
            uncertainty_before=before_regions.get(r["region"], {}).get("uncertainty"),
            uncertainty_after=r.get("uncertainty"),
        )
        for r in after["regions"]
    ]


def _checkpoint_grades(document: Mapping[str, Any]) -> list[dict[str, Any]]:
    return (document.get("checkpoints") or {}).get("grading") or []


def _canonical(value: Any) -> str:
    return json.dumps(value, sort_keys=True, default=str)
