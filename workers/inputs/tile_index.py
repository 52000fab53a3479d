"""Spatial index of tiles: which tiles overlap a grid's footprint, in any CRS.

Tiles are grouped by CRS, one R-tree (shapely STRtree) per group; a grid in another CRS is
reprojected (bounds densified) into each group's CRS. CRS objects and transformers are cached.
"""

from __future__ import annotations

from collections.abc import Sequence
from functools import lru_cache
from typing import TYPE_CHECKING

import numpy as np
from pyproj import Transformer
from shapely import STRtree, box

from demaudit.workers.tile.grid import Grid, crs_of

if TYPE_CHECKING:
    from demaudit.workers.inputs.catalog import TileInfo


@lru_cache(maxsize=64)
def transformer_between(source: str, target: str) -> Transformer:
    return Transformer.from_crs(crs_of(source), crs_of(target), always_xy=True)


@lru_cache(maxsize=256)
def same_crs(a: str, b: str) -> bool:
    return crs_of(a).equals(crs_of(b))


class TileIndex:
    """Spatial index of tiles, grouped by CRS, answering 'which tiles overlap these bounds'."""

    def __init__(self, tiles: Sequence[TileInfo]) -> None:
        self._groups: dict[str, tuple[list[TileInfo], STRtree]] = {}
        by_crs: dict[str, list[TileInfo]] = {}
        for tile in tiles:
            by_crs.setdefault(tile.grid.crs, []).append(tile)
        for crs, members in by_crs.items():
            tree = STRtree([box(*t.bounds) for t in members])
            self._groups[crs] = (members, tree)

    def __len__(self) -> int:
        return sum(len(members) for members, _ in self._groups.values())

    def overlapping(self, grid: Grid) -> list[TileInfo]:
        """Tiles whose footprint overlaps the footprint of grid (any CRS)."""
        found: list[TileInfo] = []
        for crs, (members, tree) in self._groups.items():
            bounds = grid.bounds
            if crs != grid.crs and not same_crs(crs, grid.crs):
                to_group = transformer_between(grid.crs, crs)
                bounds = to_group.transform_bounds(*bounds, densify_pts=21)
            hits = tree.query(box(*bounds), predicate="intersects")
            found.extend(
                m for m in (members[i] for i in np.sort(hits)) if _share_area(m.bounds, bounds)
            )
        return found


def _share_area(a: Sequence[float], b: Sequence[float]) -> bool:
    """Whether two (left, bottom, right, top) boxes share an area (touching is not enough)."""
    return min(a[2], b[2]) > max(a[0], b[0]) and min(a[3], b[3]) > max(a[1], b[1])
