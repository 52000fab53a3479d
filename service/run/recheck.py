"""Re-check against a baseline run: plan which tiles to recompute, bring the others' results
back from the baseline's results.zarr, and report what changed."""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import Any

from demaudit.workers.errors import SpecError
from demaudit.workers.inputs.catalog import TileInfo, headers_checked, tiles_from_catalog
from demaudit.workers.outputs.summary_store import (
    AFTER_PART,
    ALL_PART,
    JOB_GROUP,
    TileSummaryStore,
    read_job_totals,
    split_after,
)
from demaudit.workers.outputs.writers import SUMMARY_NAME, ZARR_NAME
from demaudit.workers.recheck.plan import ChangePlan, Thresholds, compare, lost_grades, plan
from demaudit.workers.stats.merge import JobAccumulator
from demaudit.workers.tile.task import OK

#: Spec sections whose change forces every tile to be recomputed.
_PROCESSING_KEYS = (
    "test",
    "reference",
    "region",
    "landcover",
    "strata",
    "options",
    "coregistration",
)


@dataclass(frozen=True)
class Baseline:
    """An earlier successful run: its summary document and results store."""

    folder: Path
    document: dict[str, Any]

    @property
    def zarr(self) -> Path:
        return self.folder / ZARR_NAME

    @cached_property
    def tiles(self) -> dict[str, dict[str, Any]]:
        return {t["tile"]: t for t in self.document.get("tiles", [])}

    @cached_property
    def catalog(self) -> dict[str, TileInfo]:
        """Path -> TileInfo of the baseline's scan (empty when it wrote no catalog.json)."""
        try:
            doc = json.loads((self.folder / "catalog.json").read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError):
            return {}
        return tiles_from_catalog(doc)

    @cached_property
    def catalog_headers_checked(self) -> bool:
        """Whether the baseline's catalog passed today's header checks (else headers are opened
        again; fingerprints of unchanged files are still reused)."""
        try:
            doc = json.loads((self.folder / "catalog.json").read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError):
            return False
        return headers_checked(doc)

    @property
    def has_job_totals(self) -> bool:
        return (self.zarr / JOB_GROUP / ALL_PART / "zarr.json").is_file()

    @cached_property
    def summaries(self) -> TileSummaryStore:
        return TileSummaryStore(self.zarr)


def load_baseline(folder: Path) -> Baseline:
    """Read a baseline run folder (SpecError when it is not a finished demaudit run)."""
    try:
        document = json.loads((Path(folder) / SUMMARY_NAME).read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise SpecError(f"baseline: {folder} holds no readable {SUMMARY_NAME}: {exc}") from None
    if not (Path(folder) / ZARR_NAME).is_dir():
        raise SpecError(f"baseline: {folder} holds no {ZARR_NAME}")
    return Baseline(Path(folder), document)


def make_plan(
    baseline: Baseline,
    spec_dump: Mapping[str, Any],
    tests: list[TileInfo],
    sources: Mapping[str, str],
    overlaps: Mapping[str, list[str]],
    *,
    region_fingerprint: str | None = None,
) -> ChangePlan:
    """The change plan; every tile is recomputed when the processing part of the spec, or the
    content of the region file, changed."""
    current = {t.tile_id: t.fingerprint for t in tests}
    before = baseline.document.get("job", {}).get("spec", {})
    changed = [
        k for k in _PROCESSING_KEYS if _canonical(before.get(k)) != _canonical(spec_dump.get(k))
    ]
    if baseline.document.get("job", {}).get("region_fingerprint") != region_fingerprint:
        changed.append("region file content")
    if changed:
        return ChangePlan(
            recompute={t: f"job spec changed ({', '.join(changed)})" for t in current},
            added=tuple(t for t in current if t not in baseline.tiles),
            removed=tuple(sorted(t for t in baseline.tiles if t not in current)),
        )
    return plan(
        baseline_tiles=baseline.tiles,
        baseline_sources=baseline.document.get("sources", {}),
        current_tiles=current,
        current_sources=sources,
        overlaps=overlaps,
    )


def known_shifts(baseline: Baseline, change: ChangePlan) -> dict[str, dict[str, Any]]:
    """The baseline's per-tile co-registration estimates of the tiles carried over."""
    return {
        tile_id: {k: v for k, v in record.items() if k != "applied"}
        for tile_id in change.reuse
        if (record := baseline.tiles[tile_id].get("coregistration"))
    }


def resumed_totals(
    baseline: Baseline, change: ChangePlan, region_ids: list[str]
) -> tuple[JobAccumulator, JobAccumulator]:
    """The baseline's job totals (and those after co-registration) without the tiles that are
    recomputed or gone: what the tiles carried over contribute. Reads only those tiles' stored
    summaries. SpecError when the baseline holds no job totals; KeyError or ValueError when its
    stored summaries are missing or do not add up."""
    acc = read_job_totals(baseline.zarr, ALL_PART, region_ids)
    if acc is None:
        raise SpecError(f"baseline: {baseline.zarr} holds no job totals ({JOB_GROUP})")
    after = read_job_totals(baseline.zarr, AFTER_PART, region_ids)
    after = after or JobAccumulator(region_ids=region_ids)
    kept = [t for t in change.reuse if baseline.tiles[t].get("status") == OK]
    missing = [t for t in kept if not baseline.summaries.has(t)]
    if missing:
        raise KeyError(f"no stored summaries for {len(missing)} tile(s), e.g. {missing[0]}")
    for tile_id in sorted({*change.recompute, *change.removed}):
        if baseline.tiles.get(tile_id, {}).get("status") != OK:
            continue  # failed or not audited: it added nothing
        entries, excluded = baseline.summaries.read(tile_id)
        own, corrected = split_after(entries)
        acc.remove(tile_id, own, excluded=excluded)
        if corrected:
            after.remove(tile_id, corrected, excluded=excluded)
    return acc, after


def change_report(
    baseline: Baseline,
    change: ChangePlan,
    document: Mapping[str, Any],
    limits: Thresholds,
) -> dict[str, Any]:
    """Tiles added, removed and recomputed with before/after figures; regions and grades."""
    before_tiles = baseline.tiles
    after_tiles = {t["tile"]: t for t in document["tiles"]}
    tiles = []
    for tile_id, why in sorted(change.recompute.items()):
        verdict = compare(
            before_tiles.get(tile_id, {}).get("stats"),
            after_tiles.get(tile_id, {}).get("stats"),
            limits,
        )
        tiles.append({"tile": tile_id, "why": why} | verdict)
    before_docs = {r["region"]: r for r in baseline.document.get("regions", [])}
    regions = [
        {"region": r["region"]}
        | compare(
            before_docs.get(r["region"], {}).get("stats"),
            r["stats"],
            limits,
            uncertainty_before=before_docs.get(r["region"], {}).get("uncertainty"),
            uncertainty_after=r.get("uncertainty"),
        )
        for r in document["regions"]
    ]
    grades = lost_grades(
        baseline.document.get("grading_indicative") or [], document.get("grading_indicative") or []
    )
    checkpoints_before = (baseline.document.get("checkpoints") or {}).get("grading") or []
    checkpoints_after = (document.get("checkpoints") or {}).get("grading") or []
    grades += lost_grades(checkpoints_before, checkpoints_after)
    regressions = sum(t["verdict"] == "regressed" for t in tiles + regions) + len(grades)
    return {
        "baseline": str(baseline.folder),
        "baseline_finished": baseline.document.get("job", {}).get("finished"),
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


def _canonical(value: Any) -> str:
    return json.dumps(value, sort_keys=True, default=str)
