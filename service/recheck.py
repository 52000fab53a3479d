"""Re-check against a baseline run: plan which tiles to recompute, bring the others' results
back from the baseline's results.zarr, and report what changed."""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass, replace
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
import zarr

from workers.catalog import TileInfo, tiles_from_catalog
from workers.errors import SpecError
from workers.recheck import ChangePlan, Thresholds, compare, lost_grades, plan
from workers.summary_store import TileSummaryStore, result_from_entries
from workers.tile_task import TileResult
from workers.writers import SUMMARY_NAME, ZARR_NAME

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
    def summaries(self) -> TileSummaryStore:
        return TileSummaryStore(self.zarr)

    @cached_property
    def overview(self) -> tuple[Any, np.ndarray, np.ndarray] | None:
        """The baseline's dh overview array and its x and y centre coordinates (None if none)."""
        try:
            root: Any = zarr.open_group(str(self.zarr), mode="r")
            group = root["dh_overview"]
            return group["dh"], np.asarray(group["x"][:]), np.asarray(group["y"][:])
        except (KeyError, FileNotFoundError, OSError):
            return None


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
) -> ChangePlan:
    """The change plan; every tile is recomputed when the processing part of the spec changed."""
    current = {t.tile_id: t.fingerprint for t in tests}
    before = baseline.document.get("job", {}).get("spec", {})
    changed = [
        k for k in _PROCESSING_KEYS if _canonical(before.get(k)) != _canonical(spec_dump.get(k))
    ]
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


def reused_result(baseline: Baseline, tile_id: str) -> TileResult:
    """A tile's result rebuilt from the baseline's stored summaries (no pixel is read)."""
    record = baseline.tiles[tile_id]
    if record.get("status") != "ok":
        return TileResult(tile_id, record["status"], record.get("reason"))
    entries, excluded = baseline.summaries.read(tile_id)
    result = result_from_entries(tile_id, entries, excluded=excluded)
    return replace(
        result,
        overview=_overview_block(baseline, record.get("bounds")),
        coregistration=record.get("coregistration"),
    )


def _overview_block(baseline: Baseline, bounds: list[float] | None) -> np.ndarray | None:
    if not bounds or baseline.overview is None:
        return None
    array, x, y = baseline.overview
    left, bottom, right, top = bounds
    cols = np.flatnonzero((x > left) & (x < right))
    rows = np.flatnonzero((y > bottom) & (y < top))
    if cols.size == 0 or rows.size == 0:
        return None
    block = array[rows[0] : rows[-1] + 1, cols[0] : cols[-1] + 1]
    return np.asarray(block, dtype=np.float32)


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
    before_regions = {r["region"]: r["stats"] for r in baseline.document.get("regions", [])}
    regions = [
        {"region": r["region"]} | compare(before_regions.get(r["region"]), r["stats"], limits)
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
