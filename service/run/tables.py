"""The statistics tables of results.zarr (tiles, regions, strata, after co-registration) from the
job's tile records and area statistics."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from demaudit.workers.coregistration.shift import SHIFT_KEYS
from demaudit.workers.outputs.layout import (
    AFTER_COREGISTRATION_GROUP,
    REGIONS_GROUP,
    STRATA_GROUP,
    TILES_GROUP,
)
from demaudit.workers.outputs.tile_records import TileRecord
from demaudit.workers.outputs.writers import ResultsStore, statistics_table, strata_table
from demaudit.workers.stats.job_statistics import AreaStatistics
from demaudit.workers.tile.task import ALL

#: Per-tile co-registration values stored as ``shift_<key>`` variables of the tiles table.
TILE_SHIFT_KEYS = SHIFT_KEYS


def write_tables(store: ResultsStore, tiles: Sequence[TileRecord], areas: AreaStatistics) -> None:
    """Write every table and close the store."""
    tables = {
        TILES_GROUP: _tile_table(tiles, with_shifts=areas.coregistration is not None),
        REGIONS_GROUP: statistics_table(
            "region",
            [r["region"] for r in areas.regions],
            [r["stats"] for r in areas.regions],
            {"name": [r["name"] for r in areas.regions]},
        ),
        STRATA_GROUP: _strata_table(areas.overall, areas.regions),
    }
    if areas.coregistration is not None:
        tables[AFTER_COREGISTRATION_GROUP] = _after_table(areas.coregistration)
    store.write_tables(tables)
    store.finish()


def _tile_table(tiles: Sequence[TileRecord], *, with_shifts: bool) -> Any:
    nan4 = (np.nan,) * 4
    bounds = np.array([t.bounds or nan4 for t in tiles], dtype=np.float64).reshape(-1, 4)
    table = statistics_table(
        "tile",
        [t.tile for t in tiles],
        [t.stats for t in tiles],
        {
            "left": bounds[:, 0],
            "bottom": bounds[:, 1],
            "right": bounds[:, 2],
            "top": bounds[:, 3],
            "status": [t.status for t in tiles],
            "reason": [t.reason or "" for t in tiles],
        },
    )
    if with_shifts:
        for key in TILE_SHIFT_KEYS:
            values = [t.coregistration.value(key) if t.coregistration else np.nan for t in tiles]
            table[f"shift_{key}"] = ("tile", np.array(values, dtype=np.float64))
    return table


def _strata_table(overall: Mapping[str, Any], regions: Sequence[Mapping[str, Any]]) -> Any:
    by_area = {ALL: overall["strata"]} | {r["region"]: r["strata"] for r in regions}
    areas = list(by_area)
    strata_keys = list(dict.fromkeys(e["stratum"] for a in areas for e in by_area[a]))
    stats = {(area, e["stratum"]): e["stats"] for area in areas for e in by_area[area]}
    return strata_table(areas, strata_keys, stats)


def _after_table(coregistration: Mapping[str, Any]) -> Any:
    after = coregistration.get("after", {}).get("regions", [])
    table = statistics_table(
        "region", [r["region"] for r in after], [r["stats"] for r in after], {}
    )
    table.attrs.update(
        {k: v for k, v in coregistration.items() if isinstance(v, int | float | str)}
    )
    return table
