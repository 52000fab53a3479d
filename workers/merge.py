"""Merge tile results into region and whole-job summaries (pure).

Region and job figures come from merging the tiles' histograms, so they are the statistics of all
their pixels together, never averages of tile figures.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

from workers import summary as dh_summary
from workers.summary import DhSummary
from workers.tile_task import OK, TileResult


@dataclass
class JobAccumulator:
    """Running merge of tile results: the whole job and each region."""

    region_ids: Sequence[str] = ()
    overall: DhSummary = field(default_factory=dh_summary.empty)
    regions: dict[str, DhSummary] = field(default_factory=dict)
    tiles_done: int = 0
    tiles_failed: int = 0

    def __post_init__(self) -> None:
        for region_id in self.region_ids:
            self.regions.setdefault(region_id, dh_summary.empty())

    def add(self, result: TileResult) -> None:
        """Fold one tile's result in (failed tiles only count as failed)."""
        self.tiles_done += 1
        if result.status != OK:
            self.tiles_failed += result.status != "no_reference"
            return
        self.overall = dh_summary.merge(self.overall, result.summary)
        for region_id, part in result.regions.items():
            current = self.regions.get(region_id, dh_summary.empty())
            self.regions[region_id] = dh_summary.merge(current, part)


def accumulate(results: Iterable[TileResult], region_ids: Sequence[str] = ()) -> JobAccumulator:
    """Merge many tile results at once."""
    acc = JobAccumulator(region_ids=region_ids)
    for result in results:
        acc.add(result)
    return acc
