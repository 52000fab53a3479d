"""Merge tile results into region, stratum and whole-job summaries (pure).

Region and job figures come from merging the tiles' histograms, so they are the statistics of all
their pixels together, never averages of tile figures. Summaries are buffered per key and merged
in batches (one sort per batch instead of one per tile).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

from workers import summary as dh_summary
from workers.summary import DhSummary
from workers.tile_task import ALL, FAILED, OK, TileResult

_BATCH = 32  # summaries buffered per key before they are merged

Key = tuple[str, str]  # (area: region id or ALL, stratum key or "")


@dataclass
class JobAccumulator:
    """Running merge of tile results: the whole job, each region, each region x stratum."""

    region_ids: Sequence[str] = ()
    excluded: int = 0
    tiles_done: int = 0
    tiles_failed: int = 0
    _parts: dict[Key, list[DhSummary]] = field(default_factory=dict, repr=False)

    def add(self, result: TileResult) -> None:
        """Fold one tile's result in (failed tiles only count as failed)."""
        self.tiles_done += 1
        if result.status != OK:
            self.tiles_failed += result.status == FAILED
            return
        self.excluded += result.excluded
        self._push((ALL, ""), result.summary)
        for region_id, part in result.regions.items():
            self._push((region_id, ""), part)
        for area, by_stratum in result.strata.items():
            for stratum, part in by_stratum.items():
                self._push((area, stratum), part)

    def _push(self, key: Key, part: DhSummary) -> None:
        parts = self._parts.setdefault(key, [])
        parts.append(part)
        if len(parts) > _BATCH:
            self._parts[key] = [dh_summary.merge_all(parts)]

    def summary(self, key: Key) -> DhSummary:
        """The merged summary of one key (empty when nothing was added under it)."""
        parts = self._parts.get(key, [])
        merged = dh_summary.merge_all(parts)
        if len(parts) > 1:
            self._parts[key] = [merged]
        return merged

    @property
    def overall(self) -> DhSummary:
        return self.summary((ALL, ""))

    @property
    def regions(self) -> dict[str, DhSummary]:
        """Every region named at construction or seen in a result."""
        seen = [a for a, s in self._parts if s == "" and a != ALL]
        ids = list(dict.fromkeys([*self.region_ids, *seen]))
        return {region_id: self.summary((region_id, "")) for region_id in ids}

    def strata_of(self, area: str = ALL) -> dict[str, DhSummary]:
        """The stratum summaries of one region (ALL: the whole job)."""
        return {s: self.summary((a, s)) for a, s in list(self._parts) if a == area and s}

    @property
    def strata(self) -> dict[str, dict[str, DhSummary]]:
        areas = dict.fromkeys(a for a, s in self._parts if s)
        return {area: self.strata_of(area) for area in areas}


def accumulate(results: Iterable[TileResult], region_ids: Sequence[str] = ()) -> JobAccumulator:
    """Merge many tile results at once."""
    acc = JobAccumulator(region_ids=region_ids)
    for result in results:
        acc.add(result)
    return acc
