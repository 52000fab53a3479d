"""Merge tile results into region, stratum and whole-job summaries (pure).

Region and job figures come from merging the tiles' histograms, so they are the statistics of all
their pixels together, never averages of tile figures. Summaries are buffered per key and merged
in batches (one sort per batch instead of one per tile).

A re-check continues an earlier run's merge instead of redoing it: it starts from that run's
totals (:meth:`JobAccumulator.resume`), takes out the old summaries of the tiles that changed or
went away (:meth:`JobAccumulator.remove`) and adds their new ones. Histograms undo exactly;
minimum and maximum do not, so the accumulator keeps them per tile (:class:`TileExtremes`).

Order: tiles arrive in whatever order the cluster finishes them, and a merge of floating-point
moments in another order differs in the last bits. So the moments (count, mean, M2) of a key are
not taken from the running merge but from each tile's own moments, kept in the same per-tile
table, combined by exactly rounded sums (math.fsum, see :meth:`TileExtremes.moments`): the
result depends on the set of tiles only, not on their order, nor on whether a re-check resumed
from stored totals (the stored table holds every kept tile's moments). Histogram counts are
integers, added exactly in any order.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace

import numpy as np
from numpy.typing import NDArray

from demaudit.workers.stats import summary as dh_summary
from demaudit.workers.stats.summary import DhSummary
from demaudit.workers.tile.task import ALL, FAILED, OK, TileResult

_BATCH = 32  # summaries buffered per key before they are merged

Key = tuple[str, str]  # (area: region id or ALL, stratum key or "")


def keyed_summaries(result: TileResult) -> dict[Key, DhSummary]:
    """A tile result's summaries keyed (area, stratum): the tile, each region, each stratum."""
    out: dict[Key, DhSummary] = {(ALL, ""): result.summary}
    out.update({(region, ""): s for region, s in result.regions.items()})
    for area, by_stratum in result.strata.items():
        out.update({(area, stratum): s for stratum, s in by_stratum.items()})
    return out


#: Columns of a TileExtremes row: minimum, maximum, count, mean, M2 of one tile under one key.
_ROW = 5


class TileExtremes:
    """The minimum, maximum and moments (count, mean, M2) of every key a tile contributed, per
    tile: what a merge cannot take back, and what merges the moments in no particular order.
    Sparse: a tile holds rows only for its own keys (the tile, the regions it touches, their
    strata), so the table grows with the entries, not with tiles x keys."""

    def __init__(self) -> None:
        self.keys: list[Key] = []
        self._column: dict[Key, int] = {}
        self._rows: dict[str, tuple[NDArray[np.int64], NDArray[np.float64]]] = {}
        self._reduced: tuple[NDArray[np.float64], NDArray[np.int64]] | None = None
        self._moments: dict[int, tuple[int, float, float]] | None = None

    def put(self, tile_id: str, entries: Mapping[Key, DhSummary]) -> None:
        for key in entries:
            if key not in self._column:
                self._column[key] = len(self.keys)
                self.keys.append(key)
        columns = np.array([self._column[k] for k in entries], dtype=np.int64)
        values = np.array(
            [(s.minimum, s.maximum, s.count, s.mean, s.m2) for s in entries.values()],
            dtype=np.float64,
        )
        self._rows[tile_id] = (columns, values.reshape(-1, _ROW))
        self._reduced = self._moments = None

    def drop(self, tile_id: str) -> None:
        self._rows.pop(tile_id, None)
        self._reduced = self._moments = None

    def of(self, key: Key) -> tuple[float, float]:
        """(minimum, maximum) of one key over the tiles present."""
        extremes, _ = self._reduce()
        column = self._column.get(key)
        if column is None:
            return math.inf, -math.inf
        return float(extremes[column, 0]), float(extremes[column, 1])

    def tiles_with(self, key: Key) -> int:
        """How many of the tiles present contributed the key (an empty summary counts)."""
        _, counts = self._reduce()
        column = self._column.get(key)
        return 0 if column is None else int(counts[column])

    def moments(self, key: Key) -> tuple[int, float, float]:
        """(count, mean, M2) of one key over the tiles present, whatever order they came in.

        With n_i, mean_i, M2_i the tiles' own moments: N = sum n_i, mean = fsum(n_i mean_i) / N,
        M2 = fsum(M2_i and n_i (mean_i - mean)^2) (the parallel-variance identity of Chan,
        Golub and LeVeque, 1979, summed at once); math.fsum rounds each sum exactly, so the
        order of the terms does not change a bit. (0, 0.0, 0.0) for a key without pixels."""
        if self._moments is None:
            self._moments = self._all_moments()
        column = self._column.get(key)
        return self._moments.get(-1 if column is None else column, (0, 0.0, 0.0))

    def _all_moments(self) -> dict[int, tuple[int, float, float]]:
        columns, values = self._concatenated()
        counted = values[:, 2] > 0
        columns, values = columns[counted], values[counted]
        order = np.argsort(columns, kind="stable")
        columns, values = columns[order], values[order]
        starts = [int(i) for i in np.flatnonzero(np.diff(columns, prepend=-1))]
        out = {}
        for start, stop in zip(starts, [*starts[1:], columns.size], strict=True):
            n, means, m2s = values[start:stop, 2], values[start:stop, 3], values[start:stop, 4]
            total = int(n.sum())  # integers below 2**53: exact in any order
            mean = math.fsum(n * means) / total
            deviation = means - mean
            m2 = math.fsum(np.concatenate([m2s, n * deviation * deviation]))
            out[int(columns[start])] = (total, mean, m2)
        return out

    def _reduce(self) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
        if self._reduced is None:
            extremes = np.empty((len(self.keys), 2))
            extremes[:, 0], extremes[:, 1] = math.inf, -math.inf
            columns, values = self._concatenated()
            np.minimum.at(extremes[:, 0], columns, values[:, 0])
            np.maximum.at(extremes[:, 1], columns, values[:, 1])
            self._reduced = extremes, np.bincount(columns, minlength=len(self.keys))
        return self._reduced

    def _concatenated(self) -> tuple[NDArray[np.int64], NDArray[np.float64]]:
        if not self._rows:
            return np.zeros(0, np.int64), np.zeros((0, _ROW))
        columns, values = zip(*self._rows.values(), strict=True)
        return np.concatenate(columns), np.concatenate(values)

    def to_arrays(self) -> dict[str, object]:
        """For storage: tile ids, keys, and per row (tile index, key index) and values
        (minimum, maximum, count, mean, M2)."""
        tiles = sorted(self._rows)
        sizes = [self._rows[t][0].size for t in tiles]
        columns = [self._rows[t][0] for t in tiles]
        values = [self._rows[t][1] for t in tiles]
        return {
            "tiles": tiles,
            "keys": list(self.keys),
            "tile": np.repeat(np.arange(len(tiles), dtype=np.int64), sizes),
            "key": np.concatenate(columns) if columns else np.zeros(0, np.int64),
            "values": np.concatenate(values) if values else np.zeros((0, _ROW)),
        }

    @classmethod
    def from_arrays(
        cls,
        tiles: Sequence[str],
        keys: Sequence[Key],
        tile: NDArray[np.int64],
        key: NDArray[np.int64],
        values: NDArray[np.float64],
    ) -> TileExtremes:
        """The table to_arrays stored; ValueError for a table without the tiles' moments (a
        store written before they were kept: the re-check then recomputes every tile)."""
        values = np.asarray(values, dtype=np.float64)
        if values.size and (values.ndim != 2 or values.shape[1] != _ROW):
            raise ValueError("the stored per-tile table has no moments (an older results store)")
        extremes = cls()
        extremes.keys = [(str(a), str(s)) for a, s in keys]
        extremes._column = {k: i for i, k in enumerate(extremes.keys)}
        order = np.argsort(tile, kind="stable")
        starts = np.searchsorted(tile[order], np.arange(len(tiles) + 1))
        for i, tile_id in enumerate(tiles):
            rows = order[starts[i] : starts[i + 1]]
            extremes._rows[tile_id] = (key[rows].astype(np.int64), values[rows].reshape(-1, _ROW))
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
            if not self._extremes.tiles_with(key):  # no tile left under this key: as if never
                del self._parts[key]
        self.excluded -= excluded

    def _push(self, key: Key, part: DhSummary) -> None:
        parts = self._parts.setdefault(key, [])
        parts.append(part)
        if len(parts) > _BATCH:
            self._parts[key] = [dh_summary.merge_all(parts)]

    def summary(self, key: Key) -> DhSummary:
        """The merged summary of one key (empty when nothing was added under it): histogram
        from the running merge; moments, minimum and maximum from the per-tile table (the same
        bits whatever order the tiles came in, and right after a removal)."""
        parts = self._parts.get(key, [])
        merged = dh_summary.merge_all(parts)
        if len(parts) > 1:
            self._parts[key] = [merged]
        if merged.count:
            lo, hi = self._extremes.of(key)
            count, mean, m2 = self._extremes.moments(key)
            if count != merged.count:
                raise ValueError(
                    f"{key}: the tiles' counts ({count}) and the merged histogram "
                    f"({merged.count}) disagree"
                )
            merged = replace(merged, mean=mean, m2=m2, minimum=lo, maximum=hi)
        return merged

    def totals(self) -> dict[Key, DhSummary]:
        """Every key's merged summary: with :meth:`extremes`, what :meth:`resume` needs."""
        return {key: self.summary(key) for key in list(self._parts)}

    def extremes(self) -> TileExtremes:
        return self._extremes

    @property
    def is_empty(self) -> bool:
        """Whether no tile result is in the merge."""
        return not self._parts

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
