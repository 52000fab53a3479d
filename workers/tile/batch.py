"""A few tiles in one cluster task: the task's fixed cost (scheduling, a round trip, the result's
hand-over) is paid once for the batch instead of once per tile (issue 13, benchmarks/RESULTS.md).

Each tile is audited exactly as alone (task.audit_and_store); a tile whose call raises becomes a
failed result naming the error, so one tile spoils no other of its batch.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

from demaudit.workers.tile.records import FAILED, TileResult
from demaudit.workers.tile.task import audit_and_store


@dataclass(frozen=True)
class TileCall:
    """One tile's arguments for audit_and_store (its positional and keyword arguments)."""

    tile_id: str
    args: tuple[Any, ...]
    kwargs: dict[str, Any] = field(default_factory=dict)


def audit_tiles(calls: Sequence[TileCall]) -> list[TileResult]:
    """audit_and_store for each call, in order: the tiles' results."""
    return [_audited(call) for call in calls]


def _audited(call: TileCall) -> TileResult:
    try:
        return audit_and_store(*call.args, **call.kwargs)
    except Exception as exc:  # noqa: BLE001 - a job never dies silently: report and go on
        reason = f"task failed on the cluster: {type(exc).__name__}: {exc}"
        return TileResult(call.tile_id, FAILED, reason)
