"""Persist tile summaries in results.zarr so later runs merge them without reading pixels.

Layout: ``results.zarr/tile_summaries/<tile id>/`` holds two arrays, ``bins`` and ``counts`` (the
histograms of all the tile's entries, concatenated), and an attribute ``entries``: one record per
(area, stratum) with the exact moments and the slice of the arrays that is its histogram. Area is
a region id or ``*`` (the whole tile); stratum is a stratum key or ``""`` (no stratum).
"""

from __future__ import annotations

import math
import shutil
from pathlib import Path
from typing import Any, Literal

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


class TileSummaryStore:
    """The ``tile_summaries`` group of one results.zarr, opened once (mode 'r' or 'a')."""

    def __init__(self, zarr_path: Path, *, mode: Literal["r", "a"] = "r") -> None:
        self.zarr_path = Path(zarr_path)
        root: Any = zarr.open_group(
            str(zarr_path),
            mode=mode,
            zarr_format=3 if mode == "a" else None,
            use_consolidated=False,
        )
        self._parent: Any = root.require_group(GROUP) if mode == "a" else root[GROUP]

    def write(self, tile_id: str, entries: dict[Key, DhSummary], *, excluded: int = 0) -> None:
        """Write (replace) one tile's summaries."""
        group = self._parent.create_group(tile_id, overwrite=True)
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
        empty = np.zeros(0, np.int64)
        bins = np.concatenate([s.bins for s in entries.values()]) if entries else empty
        counts = np.concatenate([s.counts for s in entries.values()]) if entries else empty
        group.create_array("bins", data=bins.astype(np.int32), chunks=(max(bins.size, 1),))
        group.create_array("counts", data=counts.astype(np.int64), chunks=(max(counts.size, 1),))
        group.attrs.update({"entries": records, "excluded": int(excluded)})

    def read(self, tile_id: str) -> tuple[dict[Key, DhSummary], int]:
        """A tile's summaries and its excluded-pixel count (KeyError when not stored)."""
        group = self._parent[tile_id]
        bins = np.asarray(group["bins"][:], dtype=np.int64)
        counts = np.asarray(group["counts"][:], dtype=np.int64)
        out: dict[Key, DhSummary] = {}
        attrs = group.attrs.asdict()
        for r in attrs["entries"]:
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
        return out, int(attrs.get("excluded", 0))

    def copy_from(self, other: Path, tile_id: str) -> None:
        """Copy one tile's stored summaries from another results.zarr, file by file."""
        target = self.zarr_path / GROUP / tile_id
        if target.exists():
            shutil.rmtree(target)
        shutil.copytree(Path(other) / GROUP / tile_id, target)


def write_tile_summaries(
    zarr_path: Path, tile_id: str, entries: dict[Key, DhSummary], *, excluded: int = 0
) -> None:
    """Write (replace) one tile's summaries (opens the store; see TileSummaryStore)."""
    TileSummaryStore(zarr_path, mode="a").write(tile_id, entries, excluded=excluded)


def read_excluded(zarr_path: Path, tile_id: str) -> int:
    """The tile's count of valid pixels dropped as excluded land cover."""
    return TileSummaryStore(zarr_path).read(tile_id)[1]


def read_tile_summaries(zarr_path: Path, tile_id: str) -> dict[Key, DhSummary]:
    """Read back what write_tile_summaries wrote (KeyError when the tile is not stored)."""
    return TileSummaryStore(zarr_path).read(tile_id)[0]


def stored_tiles(zarr_path: Path) -> list[str]:
    """Ids of the tiles whose summaries are stored."""
    try:
        root = zarr.open_group(str(zarr_path), mode="r", use_consolidated=False)
        return sorted(root[GROUP].group_keys())  # type: ignore[union-attr]
    except (KeyError, FileNotFoundError):
        return []


def _finite_or_none(value: float) -> float | None:
    return value if math.isfinite(value) else None
