"""Persist summaries in results.zarr so later runs merge them without reading pixels.

Layout: ``results.zarr/tile_summaries/<tile id>/`` holds one array ``histograms`` of two rows,
bin indices and counts (the histograms of all the tile's entries, concatenated; int32 while the
counts fit), and an attribute ``entries``: one record per (area, stratum) with the exact moments
and the slice of the array that is its histogram. Entries that are one summary (a region holding
every pixel of the tile has the tile's) share one slice. Area is a region id or ``*`` (the whole
tile); stratum is a stratum key or ``""`` (no stratum). Stores written before hold the two rows
as two arrays, ``bins`` and ``counts``; both layouts are read.

``results.zarr/job_summaries/<part>/`` (part ``all``, or ``after`` for the statistics after
co-registration) holds the job's merged totals in the same layout, plus each tile's minimum and
maximum per entry it contributed (arrays ``extremes_tile``, ``extremes_key``, ``extremes_values``
indexing the attributes ``extremes_tiles`` and ``extremes_keys``) and the total of excluded
pixels: what a re-check needs to continue the merge (workers/stats/merge.py).
"""

from __future__ import annotations

import json
import math
import shutil
from functools import cache
from pathlib import Path
from typing import Any, Literal

import numpy as np
import zarr
from numcodecs import Blosc
from numpy.typing import NDArray
from zarr.codecs import BloscCodec
from zarr.core.group import GroupMetadata
from zarr.core.metadata.v3 import ArrayV3Metadata
from zarr.storage import MemoryStore

from demaudit.workers.outputs.folder import link_or_copy, write_by_rename
from demaudit.workers.outputs.layout import (
    JOB_SUMMARIES_GROUP,
    TILE_SUMMARIES_GROUP,
)
from demaudit.workers.stats.merge import JobAccumulator, TileExtremes, keyed_summaries
from demaudit.workers.stats.summary import DhSummary
from demaudit.workers.tile.task import TileResult

Key = tuple[str, str]  # (area, stratum)


HISTOGRAMS = "histograms"  # the array of a group's histograms (bins, counts)
#: Codec of the stored histograms: LZ4 on byte-shuffled integers, about as fast as writing them
#: raw and several times smaller (measured: benchmarks/RESULTS.md, issue 13). write_group_files
#: encodes the chunk with numcodecs' Blosc made from it (the bytes zarr writes, tested).
_HISTOGRAM_CODEC = BloscCodec(cname="lz4", clevel=1, shuffle="shuffle")
_SHUFFLES = {"noshuffle": Blosc.NOSHUFFLE, "shuffle": Blosc.SHUFFLE, "bitshuffle": Blosc.BITSHUFFLE}
_HISTOGRAM_BLOSC = Blosc(
    cname=_HISTOGRAM_CODEC.cname.value,
    clevel=_HISTOGRAM_CODEC.clevel,
    shuffle=_SHUFFLES[_HISTOGRAM_CODEC.shuffle.value],
    blocksize=_HISTOGRAM_CODEC.blocksize,
)
#: The histograms' one chunk is ``c.0.0`` beside the array's zarr.json (zarr's default chunk
#: key encoding with "." as separator: two folders fewer to make per tile than ``c/0/0``).
_CHUNK_KEYS = {"name": "default", "separator": "."}
AFTER = "after:"  # area prefix of the summaries after co-registration


def entries_of(result: TileResult, *, prefix: str = "") -> dict[Key, DhSummary]:
    """All summaries of a tile result, keyed (area, stratum); those after co-registration carry
    the area prefix ``after:``."""
    out = {(prefix + area, stratum): s for (area, stratum), s in keyed_summaries(result).items()}
    if result.corrected is not None:
        out.update(entries_of(result.corrected, prefix=AFTER))
    return out


def split_after(entries: dict[Key, DhSummary]) -> tuple[dict[Key, DhSummary], dict[Key, DhSummary]]:
    """A tile's stored entries split into those of its result and those after co-registration
    (prefix removed)."""
    own = {k: s for k, s in entries.items() if not k[0].startswith(AFTER)}
    after = {
        (a.removeprefix(AFTER), st): s for (a, st), s in entries.items() if a.startswith(AFTER)
    }
    return own, after


def open_store_group(zarr_path: Path, name: str, *, mode: Literal["r", "r+", "a"]) -> Any:
    """A group of per-tile records at the root of a results.zarr, opened without consolidated
    metadata: made when missing in mode 'a'; in modes 'r' and 'r+' (read and write) the store
    and the group must exist (an error, never a new store)."""
    root: Any = zarr.open_group(
        str(zarr_path),
        mode=mode,
        zarr_format=3 if mode == "a" else None,
        use_consolidated=False,
    )
    return root.require_group(name) if mode == "a" else root[name]


class TileSummaryStore:
    """The ``tile_summaries`` group of one results.zarr, opened once (mode 'r', 'r+' or 'a')."""

    def __init__(self, zarr_path: Path, *, mode: Literal["r", "r+", "a"] = "r") -> None:
        self.zarr_path = Path(zarr_path)
        self._parent: Any = open_store_group(zarr_path, TILE_SUMMARIES_GROUP, mode=mode)

    def write(self, tile_id: str, entries: dict[Key, DhSummary], *, excluded: int = 0) -> None:
        """Write (replace) one tile's summaries (runs once per tile on the workers);
        FileNotFoundError when the store's tile_summaries group is gone (none is made)."""
        folder = self.zarr_path / TILE_SUMMARIES_GROUP / tile_id
        write_group_files(folder, entries, {"excluded": int(excluded)})

    def read(self, tile_id: str) -> tuple[dict[Key, DhSummary], int]:
        """A tile's summaries and its excluded-pixel count (KeyError when not stored;
        ValueError when a histogram does not add up to its entry's count, e.g. a chunk lost)."""
        group = self._parent[tile_id]
        entries, attrs = read_entries(group)
        for key, s in entries.items():
            if int(s.counts.sum()) != s.count:
                raise ValueError(f"stored summaries of tile {tile_id} ({key}) do not add up")
        return entries, int(attrs.get("excluded", 0))

    def has(self, tile_id: str) -> bool:
        """Whether the tile's summaries are stored (a file check, nothing is read)."""
        return (self.zarr_path / TILE_SUMMARIES_GROUP / tile_id / "zarr.json").is_file()

    def link_from(self, other: Path, tile_ids: list[str]) -> None:
        """Bring tiles' stored summaries over from another results.zarr: hard links where the
        file system allows (zarr replaces a file on write, never rewrites it in place, so the
        other store stays as it was), copies elsewhere."""
        for tile_id in tile_ids:
            target = self.zarr_path / TILE_SUMMARIES_GROUP / tile_id
            if target.exists():
                shutil.rmtree(target)
            shutil.copytree(
                Path(other) / TILE_SUMMARIES_GROUP / tile_id, target, copy_function=link_or_copy
            )


def write_job_totals(zarr_path: Path, part: str, acc: JobAccumulator) -> None:
    """Store a job's merged totals and per-tile extremes under job_summaries/<part>."""
    root: Any = zarr.open_group(str(zarr_path), mode="a", zarr_format=3, use_consolidated=False)
    table = acc.extremes().to_arrays()
    attrs = {
        "excluded": int(acc.excluded),
        "extremes_tiles": table["tiles"],
        "extremes_keys": [list(k) for k in table["keys"]],  # type: ignore[attr-defined]
    }
    group = write_entries(root.require_group(JOB_SUMMARIES_GROUP), part, acc.totals(), attrs)
    for name in ("tile", "key", "values"):
        data = np.asarray(table[name])
        group.create_array(
            f"extremes_{name}", data=data, chunks=tuple(max(n, 1) for n in data.shape)
        )


def read_job_totals(zarr_path: Path, part: str, region_ids: list[str]) -> JobAccumulator | None:
    """A job accumulator resumed from job_summaries/<part> (None when the store has none);
    ValueError when a stored histogram does not add up to its count."""
    try:
        root: Any = zarr.open_group(str(zarr_path), mode="r", use_consolidated=False)
        group = root[JOB_SUMMARIES_GROUP][part]
    except (KeyError, FileNotFoundError):
        return None
    totals, attrs = read_entries(group)
    for key, s in totals.items():
        if int(s.counts.sum()) != s.count:
            raise ValueError(f"stored job totals of {key} do not add up")
    extremes = TileExtremes.from_arrays(
        attrs["extremes_tiles"],
        [(a, st) for a, st in attrs["extremes_keys"]],
        np.asarray(group["extremes_tile"][...], dtype=np.int64),
        np.asarray(group["extremes_key"][...], dtype=np.int64),
        np.asarray(group["extremes_values"][...], dtype=np.float64),
    )
    return JobAccumulator.resume(
        totals, extremes, excluded=int(attrs.get("excluded", 0)), region_ids=region_ids
    )


def write_entries(
    parent: Any, name: str, entries: dict[Key, DhSummary], attrs: dict[str, Any]
) -> Any:
    """Make (replace) the group ``name`` of parent holding the entries: their histograms in one
    array, moments and slices in the attribute ``entries`` beside ``attrs``. Both nodes are made
    in one go from their metadata documents (zarr.create_hierarchy; creating them one by one
    read and rewrote the parent groups' documents each time: 11 ms a tile instead of 4, issue
    13). Returns the group."""
    records, table = packed_entries(entries)
    path = f"{parent.path}/{name}" if parent.path else name
    nodes: dict[str, Any] = {  # path -> GroupMetadata or ArrayV3Metadata
        path: GroupMetadata(attributes={"entries": records, **attrs}),
        f"{path}/{HISTOGRAMS}": _histogram_metadata(table),
    }
    made: dict[str, Any] = dict(
        zarr.create_hierarchy(store=parent.store, nodes=nodes, overwrite=True)
    )
    made[f"{path}/{HISTOGRAMS}"][...] = table
    return made[path]


def write_group_files(folder: Path, entries: dict[Key, DhSummary], attrs: dict[str, Any]) -> None:
    """write_entries for a group in a local store, written as files without zarr's
    asynchronous store layer (9 ms a tile there, most of it hand-offs between threads; issue
    13): the same documents (zarr's metadata classes make them) and chunk bytes (tested against
    what zarr writes). Order: a group that was there is removed first, its zarr.json before
    anything else (a removal cut short leaves no group); then the histograms' chunk and
    document, the group's document last and by rename, so a group whose zarr.json is there is
    whole (TileSummaryStore.has). folder's parent must exist (FileNotFoundError otherwise: a
    store removed meanwhile is not made again)."""
    records, table = packed_entries(entries)
    group = _group_json({"entries": records, **attrs})
    array = _histogram_json(table)
    if folder.exists():
        (folder / "zarr.json").unlink(missing_ok=True)
        shutil.rmtree(folder)
    histograms = folder / HISTOGRAMS
    folder.mkdir()
    histograms.mkdir()
    if table.size:  # an empty table has no chunk (as zarr writes it)
        little = np.ascontiguousarray(table, dtype=table.dtype.newbyteorder("<"))
        # "." chunk keys: the chunk lies in histograms itself (no folder to make, none remade)
        chunk = histograms / _histogram_template(table.dtype.name).encode_chunk_key((0, 0))
        chunk.write_bytes(_HISTOGRAM_BLOSC.encode(little))
    (histograms / "zarr.json").write_bytes(array)
    write_by_rename(folder / "zarr.json", group)


def _metadata_json(document: dict[str, Any]) -> bytes:
    """A metadata document as zarr's to_buffer_dict encodes it (json.dumps with zarr's indent;
    NaN allowed)."""
    return json.dumps(document, indent=zarr.config.get("json_indent"), allow_nan=True).encode()


@cache
def _group_document() -> dict[str, Any]:
    """GroupMetadata's document of a zarr v3 group without attributes (its key order)."""
    return GroupMetadata().to_dict()


def _group_json(attributes: dict[str, Any]) -> bytes:
    """The zarr.json GroupMetadata(attributes=attributes) writes, made from the cached document:
    without the deep copy of every attribute that GroupMetadata.to_dict makes (about a third of
    writing a tile's summaries, issue 13; tests hold the bytes to zarr's own)."""
    return _metadata_json({**_group_document(), "attributes": attributes})


@cache
def _histogram_template(dtype: str) -> ArrayV3Metadata:
    """The metadata of a histograms array of dtype (2 x 1; for its chunk key)."""
    return ArrayV3Metadata.from_dict(_histogram_document(dtype))


def _histogram_json(table: NDArray[Any]) -> bytes:
    """The zarr.json of the array holding table in one chunk (_histogram_metadata's document,
    encoded without building and checking the metadata anew for every tile; tests hold the
    bytes to zarr's own)."""
    return _metadata_json(_histogram_fields(table))


@cache
def _histogram_document(dtype: str) -> dict[str, Any]:
    """The metadata document zarr makes for a histograms array of dtype (one chunk, the
    histogram codec), made once per process on a throwaway in-memory store."""
    made = zarr.create_array(
        MemoryStore(),
        shape=(2, 1),
        dtype=dtype,
        chunks=(2, 1),
        compressors=_HISTOGRAM_CODEC,
        chunk_key_encoding=_CHUNK_KEYS,  # type: ignore[arg-type]
    )
    return dict(made.metadata.to_dict())


def _histogram_fields(table: NDArray[Any]) -> dict[str, Any]:
    """The metadata document of an array holding table in one chunk: its dtype's document
    with table's shape and chunk shape."""
    chunk = {"name": "regular", "configuration": {"chunk_shape": (2, max(table.shape[1], 1))}}
    return {**_histogram_document(table.dtype.name), "shape": table.shape, "chunk_grid": chunk}


def _histogram_metadata(table: NDArray[Any]) -> ArrayV3Metadata:
    """The metadata of an array holding table in one chunk."""
    return ArrayV3Metadata.from_dict(_histogram_fields(table))


def packed_entries(entries: dict[Key, DhSummary]) -> tuple[list[dict[str, Any]], NDArray[Any]]:
    """One record per entry (moments, extremes, the slice of its histogram) and the histograms
    concatenated as two rows, bins and counts (int32 when every value fits, else int64). An
    entry that is the same summary object as an earlier one shares its slice."""
    records: list[dict[str, Any]] = []
    slices: dict[int, tuple[int, int]] = {}
    distinct: list[DhSummary] = []
    offset = 0
    for (area, stratum), s in entries.items():
        if id(s) not in slices:
            slices[id(s)] = (offset, int(s.bins.size))
            distinct.append(s)
            offset += int(s.bins.size)
        start, length = slices[id(s)]
        records.append(
            {
                "area": area,
                "stratum": stratum,
                "count": s.count,
                "mean": s.mean,
                "m2": s.m2,
                "min": _finite_or_none(s.minimum),
                "max": _finite_or_none(s.maximum),
                "offset": start,
                "length": length,
            }
        )
    wide = any(s.count >= 2**31 for s in distinct)
    table = np.zeros((2, offset), dtype=np.int64 if wide else np.int32)
    at = 0
    for s in distinct:
        table[0, at : at + s.bins.size] = s.bins
        table[1, at : at + s.bins.size] = s.counts
        at += s.bins.size
    return records, table


def read_entries(group: Any) -> tuple[dict[Key, DhSummary], dict[str, Any]]:
    """The entries packed_entries wrote (or the two-array layout of earlier stores)."""
    if HISTOGRAMS in group:
        table = np.asarray(group[HISTOGRAMS][...], dtype=np.int64).reshape(2, -1)
        bins, counts = table[0], table[1]
    else:
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
    return out, attrs


def _finite_or_none(value: float) -> float | None:
    return value if math.isfinite(value) else None
