"""summary.json assembled once from the typed parts a job's phases produce (pure).

Sections in order: those of summary_document.build_summary (job, sign, units, resolution,
overall, regions, tiles, reference failures, co-registration, cautions), then the error model,
the sources, the checkpoints, the indicative grading, the re-check report and the figures.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from demaudit.workers.outputs.summary_document import build_summary
from demaudit.workers.outputs.tile_records import TileRecord
from demaudit.workers.spec import ResolvedJob
from demaudit.workers.stats.derivatives_merge import derivative_cautions
from demaudit.workers.stats.job_statistics import AreaStatistics
from demaudit.workers.tile.task import FAILED


@dataclass(frozen=True)
class JobInfo:
    """The ``job`` section: what ran, when (ISO 8601 UTC), with which software, and the tile
    counts of the spec; timings_s: wall time of the phases, once they are known."""

    name: str
    spec: Mapping[str, Any]
    started: str
    finished: str
    software: str
    region_fingerprint: str | None
    test_tiles: int
    reference_tiles: int
    timings_s: Mapping[str, float] | None = None

    def document(self, tiles: Sequence[TileRecord]) -> dict[str, Any]:
        out = {
            "name": self.name,
            "spec": self.spec,
            "started": self.started,
            "finished": self.finished,
            "software": self.software,
            "region_fingerprint": self.region_fingerprint,
            "tiles": {
                "test": self.test_tiles,
                "reference": self.reference_tiles,
                "failed": sum(t.status == FAILED for t in tiles),
            },
        }
        if self.timings_s is not None:
            out["timings_s"] = dict(self.timings_s)
        return out


def job_info(
    job: ResolvedJob,
    *,
    region_fingerprint: str | None,
    started: str,
    finished: str,
    software: str,
) -> JobInfo:
    """The ``job`` section of a resolved job (its spec as JSON, its tile counts)."""
    return JobInfo(
        name=job.spec.name,
        spec=job.spec.model_dump(mode="json"),
        started=started,
        finished=finished,
        software=software,
        region_fingerprint=region_fingerprint,
        test_tiles=len(job.test_tiles),
        reference_tiles=len(job.reference_tiles),
    )


@dataclass(frozen=True)
class Figures:
    """The ``figures`` section (figure name -> file), or why they could not be drawn."""

    files: Mapping[str, Any] = field(default_factory=dict)
    failure: str | None = None


@dataclass(frozen=True)
class JobParts:
    """Everything summary.json holds, as the phases produced it.

    early_cautions: cautions on the tiles, regions and overlaps (before the failure and datum
    cautions of build_summary); cautions: those on the sources and baseline (after them)."""

    job: JobInfo
    areas: AreaStatistics
    excluded_pixels: int
    tiles: Sequence[TileRecord]
    reference_failures: Sequence[Mapping[str, str]]
    sources: Mapping[str, Any]
    early_cautions: Sequence[str] = ()
    cautions: Sequence[str] = ()
    checkpoints: Mapping[str, Any] | None = None
    grading_indicative: list[dict[str, Any]] | None = None
    recheck: Mapping[str, Any] | None = None
    figures: Figures | None = None
    derivatives: Mapping[str, Any] | None = None  # workers/outputs/derivatives.py


def assemble(parts: JobParts) -> dict[str, Any]:
    """The summary.json document of the parts."""
    document = build_summary(
        job=parts.job.document(parts.tiles),
        overall=parts.areas.overall | {"excluded_pixels": parts.excluded_pixels},
        regions=parts.areas.regions,
        tiles=[t.document() for t in parts.tiles],
        reference_failures=parts.reference_failures,
        extra_cautions=parts.early_cautions,
        coregistration=parts.areas.coregistration,
    )
    if parts.areas.error_model is not None:
        document["error_model"] = parts.areas.error_model
    document["sources"] = dict(parts.sources)
    document["cautions"] += list(parts.cautions)
    if parts.checkpoints is not None:
        document["checkpoints"] = dict(parts.checkpoints)
        document["cautions"] += parts.checkpoints.get("cautions", [])
    if parts.grading_indicative is not None:
        document["grading_indicative"] = parts.grading_indicative
    if parts.recheck is not None:
        document["recheck"] = dict(parts.recheck)
    if parts.derivatives is not None:
        document["derivatives"] = dict(parts.derivatives)
        document["cautions"] += derivative_cautions(parts.derivatives)
    if parts.figures is not None:
        document["figures"] = dict(parts.figures.files)
        if parts.figures.failure is not None:
            document["cautions"].append(parts.figures.failure)
    return document
