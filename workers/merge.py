"""Merge tile results into region, stratum and whole-job summaries (pure).

Region and job figures come from merging the tiles' histograms, so they are the statistics of all
their pixels together, never averages of tile figures.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

from workers import summary as dh_summary
from workers.summary import DhSummary
from workers.tile_task import ALL, FAILED, OK, TileResult


@dataclass
class JobAccumulator:
    """Running merge of tile results: the whole job, each region, each region x stratum.

    ``strata`` is keyed by region id (``ALL`` for the whole job), then stratum key.
    """

    region_ids: Sequence[str] = ()
    overall: DhSummary = field(default_factory=dh_summary.empty)
    regions: dict[str, DhSummary] = field(default_factory=dict)
    strata: dict[str, dict[str, DhSummary]] = field(default_factory=dict)
    excluded: int = 0
    tiles_done: int = 0
    tiles_failed: int = 0

    def __post_init__(self) -> None:
        for region_id in self.region_ids:
            self.regions.setdefault(region_id, dh_summary.empty())

    def add(self, result: TileResult) -> None:
        """Fold one tile's result in (failed tiles only count as failed)."""
        self.tiles_done += 1
        if result.status != OK:
            self.tiles_failed += result.status == FAILED
            return
        self.overall = dh_summary.merge(self.overall, result.summary)
        self.excluded += result.excluded
        for region_id, part in result.regions.items():
            current = self.regions.get(region_id, dh_summary.empty())
            self.regions[region_id] = dh_summary.merge(current, part)
        for area, by_stratum in result.strata.items():
            target = self.strata.setdefault(area, {})
            for stratum, part in by_stratum.items():
                target[stratum] = dh_summary.merge(target.get(stratum, dh_summary.empty()), part)

    def strata_of(self, area: str = ALL) -> dict[str, DhSummary]:
        """The stratum summaries of one region (ALL: the whole job)."""
        return self.strata.get(area, {})


def accumulate(results: Iterable[TileResult], region_ids: Sequence[str] = ()) -> JobAccumulator:
    """Merge many tile results at once."""
    acc = JobAccumulator(region_ids=region_ids)
    for result in results:
        acc.add(result)
    return acc
