"""Persist tile summaries in results.zarr so later runs merge them without reading pixels.

Layout: ``results.zarr/tile_summaries/<tile id>/`` holds two arrays, ``bins`` and ``counts`` (the
histograms of all the tile's entries, concatenated), and an attribute ``entries``: one record per
(area, stratum) with the exact moments and the slice of the arrays that is its histogram. Area is
a region id or ``*`` (the whole tile); stratum is a stratum key or ``""`` (no stratum).
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import zarr

from workers.summary import DhSummary
from workers.tile_task import ALL, OK, TileResult

GROUP = "tile_summaries"
Key = tuple[str, str]  # (area, stratum)


AFTER = "after:"  # area prefix of the summaries after co-registration


def entries_of(result: TileResult, *, prefix: str = "") -> dict[Key, DhSummary]:
    """All summaries of a tile result, keyed (area, stratum); those after co-registration carry
    the area prefix ``after:``."""
    out: dict[Key, DhSummary] = {(prefix + ALL, ""): result.summary}
    out.update({(prefix + region, ""): s for region, s in result.regions.items()})
    for area, by_stratum in result.strata.items():
        out.update({(prefix + area, stratum): s for stratum, s in by_stratum.items()})
    if result.corrected is not None:
        out.update(entries_of(result.corrected, prefix=AFTER))
    return out


def result_from_entries(
    tile_id: str, entries: dict[Key, DhSummary], *, excluded: int = 0, prefix: str = ""
) -> TileResult:
    """Rebuild a tile's result (status ok) from its stored summaries."""
    mine = {
        (a.removeprefix(prefix), st): s
        for (a, st), s in entries.items()
        if a.startswith(prefix) and not (prefix == "" and a.startswith(AFTER))
    }
    regions = {a: s for (a, st), s in mine.items() if st == "" and a != ALL}
    strata: dict[str, dict[str, DhSummary]] = {}
    for (a, st), s in mine.items():
        if st:
            strata.setdefault(a, {})[st] = s
    corrected = None
    if prefix == "" and any(a.startswith(AFTER) for a, _ in entries):
        corrected = result_from_entries(tile_id, entries, excluded=excluded, prefix=AFTER)
    return TileResult(
        tile_id,
        OK,
        None,
        summary=mine[(ALL, "")],
        regions=regions,
        strata=strata,
        excluded=excluded,
        corrected=corrected,
    )


def write_tile_summaries(
    zarr_path: Path, tile_id: str, entries: dict[Key, DhSummary], *, excluded: int = 0
) -> None:
    """Write (replace) one tile's summaries."""
    root = zarr.open_group(str(zarr_path), mode="a", zarr_format=3, use_consolidated=False)
    parent = root.require_group(GROUP)
    group = parent.create_group(tile_id, overwrite=True)
    records: list[dict[str, Any]] = []
    offset = 0
    for (area, stratum), s in entries.items():
        records.append(
            {
                "area": area,
                "stratum": stratum,
                "count": s.count,
                "mean": s.mean,
                "m2": s.m2,
                "min": _finite_or_none(s.minimum),
                "max": _finite_or_none(s.maximum),
                "offset": offset,
                "length": int(s.bins.size),
            }
        )
        offset += int(s.bins.size)
    bins = np.concatenate([s.bins for s in entries.values()]) if entries else np.zeros(0, np.int64)
    counts = (
        np.concatenate([s.counts for s in entries.values()]) if entries else np.zeros(0, np.int64)
    )
    group.create_array("bins", data=bins.astype(np.int32), chunks=(max(bins.size, 1),))
    group.create_array("counts", data=counts.astype(np.int64), chunks=(max(counts.size, 1),))
    group.attrs["entries"] = records
    group.attrs["excluded"] = int(excluded)


def read_excluded(zarr_path: Path, tile_id: str) -> int:
    """The tile's count of valid pixels dropped as excluded land cover."""
    root = zarr.open_group(str(zarr_path), mode="r", use_consolidated=False)
    group: Any = root[f"{GROUP}/{tile_id}"]
    return int(group.attrs.get("excluded", 0))


def read_tile_summaries(zarr_path: Path, tile_id: str) -> dict[Key, DhSummary]:
    """Read back what write_tile_summaries wrote (KeyError when the tile is not stored)."""
    root = zarr.open_group(str(zarr_path), mode="r", use_consolidated=False)
    group: Any = root[f"{GROUP}/{tile_id}"]
    bins = np.asarray(group["bins"][:], dtype=np.int64)
    counts = np.asarray(group["counts"][:], dtype=np.int64)
    out: dict[Key, DhSummary] = {}
    records: list[dict[str, Any]] = group.attrs["entries"]
    for r in records:
        part = slice(r["offset"], r["offset"] + r["length"])
        out[(r["area"], r["stratum"])] = DhSummary(
            int(r["count"]),
            float(r["mean"]),
            float(r["m2"]),
            math.inf if r["min"] is None else float(r["min"]),
            -math.inf if r["max"] is None else float(r["max"]),
            bins[part].copy(),
            counts[part].copy(),
        )
    return out


def stored_tiles(zarr_path: Path) -> list[str]:
    """Ids of the tiles whose summaries are stored."""
    try:
        root = zarr.open_group(str(zarr_path), mode="r", use_consolidated=False)
        return sorted(root[GROUP].group_keys())  # type: ignore[union-attr]
    except (KeyError, FileNotFoundError):
        return []


def _finite_or_none(value: float) -> float | None:
    return value if math.isfinite(value) else None
