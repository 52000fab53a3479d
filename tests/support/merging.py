"""Test helper: merge many tile results at once."""

from __future__ import annotations

from collections.abc import Iterable, Sequence

from demaudit.workers.stats.merge import JobAccumulator
from demaudit.workers.tile.task import TileResult


def accumulate(results: Iterable[TileResult], region_ids: Sequence[str] = ()) -> JobAccumulator:
    """A JobAccumulator that has added every result in order."""
    acc = JobAccumulator(region_ids=region_ids)
    for result in results:
        acc.add(result)
    return acc
