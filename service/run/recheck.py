"""Re-check against a baseline run: read the baseline's folder (``Baseline``) and the job totals
of the tiles it keeps; the plan and the change report are pure (workers/recheck/baseline.py)."""

from __future__ import annotations

import json
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import Any

from demaudit.workers.errors import SpecError
from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.inputs.catalog_file import headers_checked, tiles_from_catalog
from demaudit.workers.outputs.layout import (
    AFTER_PART,
    ALL_PART,
    CATALOG_NAME,
    JOB_SUMMARIES_GROUP,
    SUMMARY_NAME,
    ZARR_NAME,
)
from demaudit.workers.outputs.summary_store import (
    TileSummaryStore,
    read_job_totals,
    split_after,
)
from demaudit.workers.outputs.tile_records import TileRecord
from demaudit.workers.recheck.baseline import change_plan, tile_records
from demaudit.workers.recheck.baseline import change_report as report_of
from demaudit.workers.recheck.plan import ChangePlan, Thresholds
from demaudit.workers.stats.merge import JobAccumulator


@dataclass(frozen=True)
class Baseline:
    """An earlier successful run: its summary document and results store."""

    folder: Path
    document: dict[str, Any]

    @property
    def zarr(self) -> Path:
        return self.folder / ZARR_NAME

    @cached_property
    def tiles(self) -> dict[str, TileRecord]:
        return tile_records(self.document)

    @cached_property
    def catalog_document(self) -> dict[str, Any]:
        """The baseline's catalog.json (empty when it wrote none or it cannot be read)."""
        try:
            doc = json.loads((self.folder / CATALOG_NAME).read_text(encoding="utf-8"))
        except (OSError, UnicodeDecodeError, json.JSONDecodeError):
            return {}
        return doc if isinstance(doc, dict) else {}

    def catalog(self, *, anchors: Sequence[str]) -> dict[str, TileInfo]:
        """Absolute path -> TileInfo of the baseline's scan, its paths resolved against the
        re-check's anchors (ResolvedJob.anchors); tiles it cannot place are left out (scanned
        again: workers/inputs/catalog_file.py)."""
        return tiles_from_catalog(self.catalog_document, anchors=anchors)

    @cached_property
    def catalog_headers_checked(self) -> bool:
        """Whether the baseline's catalog passed today's header checks (else headers are opened
        again; fingerprints of unchanged files are still reused)."""
        return headers_checked(self.catalog_document)

    @property
    def has_job_totals(self) -> bool:
        return (self.zarr / JOB_SUMMARIES_GROUP / ALL_PART / "zarr.json").is_file()

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
    """The change plan (workers/recheck/baseline.py: change_plan) of the tests against it."""
    current = {t.tile_id: t.fingerprint for t in tests}
    return change_plan(
        baseline.document,
        spec_dump,
        current,
        sources,
        overlaps,
        region_fingerprint=region_fingerprint,
    )


def resumed_totals(
    baseline: Baseline, change: ChangePlan, region_ids: list[str]
) -> tuple[JobAccumulator, JobAccumulator]:
    """The baseline's job totals (and those after co-registration) without the tiles that are
    recomputed or gone: what the tiles carried over contribute. Reads only those tiles' stored
    summaries. SpecError when the baseline holds no job totals; KeyError or ValueError when its
    stored summaries are missing or do not add up."""
    acc = read_job_totals(baseline.zarr, ALL_PART, region_ids)
    if acc is None:
        raise SpecError(f"baseline: {baseline.zarr} holds no job totals ({JOB_SUMMARIES_GROUP})")
    after = read_job_totals(baseline.zarr, AFTER_PART, region_ids)
    after = after or JobAccumulator(region_ids=region_ids)
    kept = [t for t in change.reuse if baseline.tiles[t].ok]
    missing = [t for t in kept if not baseline.summaries.has(t)]
    if missing:
        raise KeyError(f"no stored summaries for {len(missing)} tile(s), e.g. {missing[0]}")
    for tile_id in sorted({*change.recompute, *change.removed}):
        record = baseline.tiles.get(tile_id)
        if record is None or not record.ok:
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
    *,
    shown: Callable[[Path], str] = str,
) -> dict[str, Any]:
    """Tiles added, removed and recomputed with before/after figures; regions and grades
    (workers/recheck/baseline.py: change_report). The baseline's folder is named by shown
    (ResolvedJob.shown: with data roots not an absolute server path, the service's baseline
    by its job id)."""
    named = shown(baseline.folder)
    return report_of(baseline.document, change, document, limits, baseline=named)
