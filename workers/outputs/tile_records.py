"""One test tile's entry in a job's results (pure): status, why, footprint, statistics, its
own shift estimate and the statistics after co-registration, the sources it overlaps.

``TileRecord.document()`` is the tile's entry of summary.json ``tiles[]``;
``TileRecord.from_document`` reads it back from a baseline (keys this version does not know
are kept, in order).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

from demaudit.workers.coregistration.shift import ShiftEstimate
from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.stats.summary import statistics
from demaudit.workers.tile.task import FAILED, NO_REFERENCE, NO_VALID_PIXELS, OK, TileResult

NOT_AUDITED = "not_audited"

#: Tile statuses of a raster job that leave tiles out of the statistics without failing.
UNAUDITED = {
    NO_REFERENCE: "no reference tile overlaps them",
    NO_VALID_PIXELS: "no pixel holds both a test and a reference height (voids or nodata)",
}

_KNOWN = (
    "tile",
    "status",
    "reason",
    "bounds",
    "fingerprint",
    "stats",
    "coregistration",
    "stats_after_coregistration",
    "sources",
)


@dataclass(frozen=True)
class TileRecord:
    """A test tile's outcome. bounds: left, bottom, right, top in the test CRS; stats: the
    tile's dh statistics (metres; empty statistics when none); sources: the reference and
    land-cover tiles it overlaps (prefixed by kind), for a computed tile."""

    tile: str
    status: str
    stats: Mapping[str, Any]
    reason: str | None = None
    bounds: tuple[float, ...] | None = None
    fingerprint: str | None = None
    coregistration: ShiftEstimate | None = None
    stats_after_coregistration: Mapping[str, Any] | None = None
    sources: tuple[str, ...] | None = None
    extra: Mapping[str, Any] = field(default_factory=dict)

    @property
    def ok(self) -> bool:
        return self.status == OK

    def document(self) -> dict[str, Any]:
        """The tile's entry of summary.json ``tiles[]``."""
        out: dict[str, Any] = {"tile": self.tile, "status": self.status}
        if self.reason:
            out["reason"] = self.reason
        if self.bounds is not None:
            out["bounds"] = list(self.bounds)
        if self.fingerprint is not None:
            out["fingerprint"] = self.fingerprint
        out["stats"] = self.stats
        if self.coregistration is not None:
            out["coregistration"] = self.coregistration.record()
        if self.stats_after_coregistration is not None:
            out["stats_after_coregistration"] = self.stats_after_coregistration
        if self.sources is not None:
            out["sources"] = list(self.sources)
        return out | dict(self.extra)

    @classmethod
    def from_document(cls, entry: Mapping[str, Any]) -> TileRecord:
        """A tile entry of an earlier summary.json."""
        bounds, shift, sources = (entry.get(k) for k in ("bounds", "coregistration", "sources"))
        return cls(
            tile=entry["tile"],
            status=entry["status"],
            stats=entry.get("stats") or {},
            reason=entry.get("reason"),
            bounds=tuple(bounds) if bounds is not None else None,
            fingerprint=entry.get("fingerprint"),
            coregistration=ShiftEstimate.from_record(shift) if shift is not None else None,
            stats_after_coregistration=entry.get("stats_after_coregistration"),
            sources=tuple(sources) if sources is not None else None,
            extra={k: v for k, v in entry.items() if k not in _KNOWN},
        )


def empty_statistics() -> dict[str, Any]:
    return statistics(dh_summary.empty())


def failed_record(tile_id: str, reason: str) -> TileRecord:
    """A test tile that could not be read."""
    return TileRecord(tile_id, FAILED, empty_statistics(), reason)


def not_audited_record(tile: TileInfo) -> TileRecord:
    """A test tile of a job without reference tiles (checkpoints only)."""
    return TileRecord(
        tile.tile_id,
        NOT_AUDITED,
        empty_statistics(),
        "no reference tiles: checkpoints only",
        tuple(tile.bounds),
        tile.fingerprint,
    )


def computed_record(result: TileResult, tile: TileInfo, sources: Sequence[str]) -> TileRecord:
    """A test tile the job audited (result: its task's result, with its final status)."""
    shift = result.coregistration
    after = result.corrected
    return TileRecord(
        result.tile_id,
        result.status,
        _statistics_of(result),
        result.reason,
        tuple(tile.bounds),
        tile.fingerprint,
        ShiftEstimate.from_record(shift) if shift is not None else None,
        _statistics_of(after) if after is not None else None,
        tuple(sources),
    )


def _statistics_of(result: TileResult) -> dict[str, float | int | None]:
    """The statistics of result.summary: as the worker worked them out, or here."""
    if result.statistics is not None:
        return dict(result.statistics)
    return statistics(result.summary)


def with_status(result: TileResult) -> TileResult:
    """A tile that was read but holds no pixel with both heights gets a status of its own (its
    empty summaries are not merged)."""
    if result.status == OK and result.summary.count == 0 and result.excluded == 0:
        reason = "no pixel holds both a test and a reference height (voids or nodata throughout)"
        return replace(result, status=NO_VALID_PIXELS, reason=reason)
    return result


def coverage_cautions(tiles: Sequence[TileRecord]) -> list[str]:
    """A caution per kind of test tile left out of the statistics without failing."""
    cautions = []
    for status, why in UNAUDITED.items():
        ids = [t.tile for t in tiles if t.status == status]
        if ids:
            shown = ", ".join(ids[:5]) + (", ..." if len(ids) > 5 else "")
            cautions.append(
                f"{len(ids)} of {len(tiles)} test tiles are not in the statistics: {why} "
                f"(status {status}: {shown})"
            )
    return cautions
