"""One tile's own shift estimate as a typed record (pure).

The Dask tasks (``estimate_tile_shift``, ``audit_and_store``) still exchange the record as a
plain mapping (see coregistration/tile.py: tile_estimate); the job's phases convert it once at
the boundary with :meth:`ShiftEstimate.from_record` and back with :meth:`ShiftEstimate.record`,
which gives the same keys in the same order (summary.json stays as it was).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

OK = "ok"

#: The estimate itself: shift, its standard errors and tilt (metres; tilts in metres per km).
SHIFT_KEYS = (
    "east_m",
    "north_m",
    "vertical_m",
    "east_se_m",
    "north_se_m",
    "tilt_east_m_per_km",
    "tilt_north_m_per_km",
)

#: The values of a tile's estimate, in the order the record lists them (SHIFT_KEYS, then counts
#: and flags as tile_estimate reports them).
VALUE_KEYS = (
    *SHIFT_KEYS,
    "iterations",
    "converged",
    "stable_pixels",
    "nmad_stable_before_m",
    "nmad_stable_after_m",
)

#: The values the job-wide estimate takes medians of.
MEDIAN_KEYS = ("east_m", "north_m", "vertical_m", "tilt_east_m_per_km", "tilt_north_m_per_km")


@dataclass(frozen=True)
class ShiftEstimate:
    """A tile's own Nuth & Kääb shift and tilt, or why it has none.

    status: 'ok', 'cannot_estimate' or 'failed'; values: VALUE_KEYS present in the record;
    applied: whether the audit removed a correction from this tile (None before the audit);
    extra: keys this version does not know, kept in order."""

    status: str
    reason: str | None = None
    values: Mapping[str, Any] = field(default_factory=dict)
    applied: bool | None = None
    extra: Mapping[str, Any] = field(default_factory=dict)

    @property
    def ok(self) -> bool:
        return self.status == OK

    def value(self, key: str) -> float:
        """One value (NaN when the record has none)."""
        found = self.values.get(key)
        return float("nan") if found is None else float(found)

    @classmethod
    def from_record(cls, record: Mapping[str, Any]) -> ShiftEstimate:
        known = {"status", "reason", "applied", *VALUE_KEYS}
        return cls(
            status=str(record.get("status", "")),
            reason=record.get("reason"),
            values={k: record[k] for k in VALUE_KEYS if k in record},
            applied=record.get("applied"),
            extra={k: v for k, v in record.items() if k not in known},
        )

    def record(self) -> dict[str, Any]:
        """The mapping tile_estimate and the tile task write: status, then (for a tile that
        could not estimate) the reason, the values, whether it was applied, and (for a tile that
        did estimate) why the correction was not applied."""
        out: dict[str, Any] = {"status": self.status}
        if self.reason is not None and not self.ok:
            out["reason"] = self.reason
        out |= {k: self.values[k] for k in VALUE_KEYS if k in self.values}
        if self.applied is not None:
            out["applied"] = self.applied
        if self.reason is not None and self.ok:
            out["reason"] = self.reason
        return out | dict(self.extra)

    def before_audit(self) -> ShiftEstimate:
        """The estimate alone, without what an audit made of it (to reuse in a re-check)."""
        return ShiftEstimate(self.status, self.reason, self.values, None, self.extra)
