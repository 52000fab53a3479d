"""Merge tile results into region, stratum and whole-job summaries (pure).

Region and job figures come from merging the tiles' histograms, so they are the statistics of all
their pixels together, never averages of tile figures. Summaries are buffered per key and merged
in batches (one sort per batch instead of one per tile).

A re-check continues an earlier run's merge instead of redoing it: it starts from that run's
totals (:meth:`JobAccumulator.resume`), takes out the old summaries of the tiles that changed or
went away (:meth:`JobAccumulator.remove`) and adds their new ones. Histograms and moments undo
exactly; minimum and maximum do not, so the accumulator keeps them per tile (:class:`TileExtremes`).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace

import numpy as np
from numpy.typing import NDArray

from workers import summary as dh_summary
from workers.summary import DhSummary
from workers.tile_task import ALL, FAILED, OK, TileResult

_BATCH = 32  # summaries buffered per key before they are merged

Key = tuple[str, str]  # (area: region id or ALL, stratum key or "")


def keyed_summaries(result: TileResult) -> dict[Key, DhSummary]:
    """A tile result's summaries keyed (area, stratum): the tile, each region, each stratum."""
    out: dict[Key, DhSummary] = {(ALL, ""): result.summary}
    out.update({(region, ""): s for region, s in result.regions.items()})
    for area, by_stratum in result.strata.items():
        out.update({(area, stratum): s for stratum, s in by_stratum.items()})
    return out


class TileExtremes:
    """The minimum and maximum of every key, per tile: what a merge cannot take back."""

    def __init__(self) -> None:
        self.keys: list[Key] = []
        self._column: dict[Key, int] = {}
        self._rows: dict[str, NDArray[np.float64]] = {}  # tile -> (keys known then, 2)
        self._reduced: dict[Key, tuple[float, float]] | None = None

    def put(self, tile_id: str, entries: Mapping[Key, DhSummary]) -> None:
        for key in entries:
            if key not in self._column:
                self._column[key] = len(self.keys)
                self.keys.append(key)
        row = np.empty((len(self.keys), 2))
        row[:, 0], row[:, 1] = math.inf, -math.inf
        for key, s in entries.items():
            row[self._column[key]] = (s.minimum, s.maximum)
        self._rows[tile_id] = row
        self._reduced = None

    def drop(self, tile_id: str) -> None:
        self._rows.pop(tile_id, None)
        self._reduced = None

    def of(self, key: Key) -> tuple[float, float]:
        """(minimum, maximum) of one key over the tiles present."""
        if self._reduced is None:
            self._reduced = self.reduce()
        return self._reduced.get(key, (math.inf, -math.inf))

    def reduce(self) -> dict[Key, tuple[float, float]]:
        """(minimum, maximum) of each key over the tiles present."""
        lo = np.full(len(self.keys), math.inf)
        hi = np.full(len(self.keys), -math.inf)
        for row in self._rows.values():
            n = row.shape[0]
            np.minimum(lo[:n], row[:, 0], out=lo[:n])
            np.maximum(hi[:n], row[:, 1], out=hi[:n])
        return {key: (float(lo[i]), float(hi[i])) for i, key in enumerate(self.keys)}

    def to_array(self) -> tuple[list[str], list[Key], NDArray[np.float64]]:
        """Tile ids, keys and the (tiles, keys, 2) array of extremes, for storage."""
        tiles = sorted(self._rows)
        out = np.empty((len(tiles), len(self.keys), 2))
        out[:, :, 0], out[:, :, 1] = math.inf, -math.inf
        for i, tile_id in enumerate(tiles):
            row = self._rows[tile_id]
            out[i, : row.shape[0]] = row
        return tiles, list(self.keys), out

    @classmethod
    def from_array(
        cls, tiles: Sequence[str], keys: Sequence[Key], values: NDArray[np.float64]
    ) -> TileExtremes:
        extremes = cls()
        extremes.keys = [tuple(k) for k in keys]  # type: ignore[misc]
        extremes._column = {k: i for i, k in enumerate(extremes.keys)}
        extremes._rows = {t: np.array(values[i], dtype=np.float64) for i, t in enumerate(tiles)}
        return extremes


@dataclass
class JobAccumulator:
    """Running merge of tile results: the whole job, each region, each region x stratum.

    ``tiles_done`` and ``tiles_failed`` count the results added here, not those of a run
    resumed from (see :meth:`resume`)."""

    region_ids: Sequence[str] = ()
    excluded: int = 0
    tiles_done: int = 0
    tiles_failed: int = 0
    _parts: dict[Key, list[DhSummary]] = field(default_factory=dict, repr=False)
    _extremes: TileExtremes = field(default_factory=TileExtremes, repr=False)

    @classmethod
    def resume(
        cls,
        totals: Mapping[Key, DhSummary],
        extremes: TileExtremes,
        *,
        excluded: int,
        region_ids: Sequence[str] = (),
    ) -> JobAccumulator:
        """Continue from an earlier run's totals (see :meth:`totals`) and per-tile extremes."""
        acc = cls(region_ids=region_ids, excluded=excluded)
        acc._parts = {key: [s] for key, s in totals.items()}
        acc._extremes = extremes
        return acc

    def add(self, result: TileResult) -> None:
        """Fold one tile's result in (failed tiles only count as failed)."""
        self.tiles_done += 1
        if result.status != OK:
            self.tiles_failed += result.status == FAILED
            return
        self.excluded += result.excluded
        entries = keyed_summaries(result)
        for key, part in entries.items():
            self._push(key, part)
        self._extremes.put(result.tile_id, entries)

    def remove(self, tile_id: str, entries: Mapping[Key, DhSummary], *, excluded: int) -> None:
        """Take out a tile added before (here or in the run resumed): its summaries as they
        were added, and its count of excluded pixels."""
        self._extremes.drop(tile_id)
        for key, part in entries.items():
            total = dh_summary.merge_all(self._parts.get(key, []))
            # extremes are left open here and taken from the per-tile table when read
            rest = dh_summary.subtract(total, part, minimum=math.inf, maximum=-math.inf)
            self._parts[key] = [rest]
        self.excluded -= excluded

    def _push(self, key: Key, part: DhSummary) -> None:
        parts = self._parts.setdefault(key, [])
        parts.append(part)
        if len(parts) > _BATCH:
            self._parts[key] = [dh_summary.merge_all(parts)]

    def summary(self, key: Key) -> DhSummary:
        """The merged summary of one key (empty when nothing was added under it); minimum and
        maximum come from the per-tile extremes, which stay right after a removal."""
        parts = self._parts.get(key, [])
        merged = dh_summary.merge_all(parts)
        if len(parts) > 1:
            self._parts[key] = [merged]
        if merged.count:
            lo, hi = self._extremes.of(key)
            merged = replace(merged, minimum=lo, maximum=hi)
        return merged

    def totals(self) -> dict[Key, DhSummary]:
        """Every key's merged summary: with :meth:`extremes`, what :meth:`resume` needs."""
        return {key: self.summary(key) for key in list(self._parts)}

    def extremes(self) -> TileExtremes:
        return self._extremes

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
