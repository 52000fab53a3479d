"""catalog.json: the tiles a scan read (header, stamp, fingerprint), written so that a re-check
need not open unchanged files, and read back by that re-check.

The document names no absolute server path. Each tile is named by the folder it lies in and its
path relative to that folder; the folders (``anchors``) are the job's data roots, or without
roots the folder the spec's relative paths were resolved against (ResolvedJob.anchors)::

    {"header_checks": 2, "crs": [wkt, ...], "roots": [key, ...],
     "tiles": [{"root": 0, "path": "release/E00_N00.tif", "tile": ..., "inode": ..., ...}]}

``roots`` holds one key per anchor (the first 16 hex digits of the SHA-256 of its resolved
path), not the path itself. Read back, a tile's path is its anchor's path (found by key among
the re-check's own anchors) joined with the relative path. A tile whose anchor is not among
them (the roots changed, the spec moved), or whose entry cannot be read, is left out: the
re-check then scans it afresh. Catalogs written before held absolute paths (no ``root``); they
are read as they are. Whatever maps a path to an entry, a tile is reused only when the file
still has the entry's whole stamp (size, mtime, ctime, inode: confine.Stamp), so a path
mapped to another file is rescanned, never reused.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.tile.grid import Grid

__all__ = [
    "HEADER_CHECKS",
    "anchor_key",
    "catalog_document",
    "headers_checked",
    "tiles_from_catalog",
]

HEADER_CHECKS = 2
"""Version of the checks a scan makes on a tile's header (2: rasters that cannot be elevation
are refused). A re-check opens again the headers of tiles an older catalog accepted."""


def anchor_key(anchor: str) -> str:
    """What catalog.json records of an anchor folder (a resolved absolute path): a short
    digest, so the document does not show the server's folders."""
    return hashlib.sha256(anchor.encode("utf-8", "surrogateescape")).hexdigest()[:16]


def relative_to_anchor(path: str, anchors: Sequence[str]) -> tuple[int, str]:
    """(index of the first anchor holding path, path relative to it, POSIX separators); a path
    no anchor holds (a CLI spec naming files above its folder) is relative to the first, with
    ``..`` steps. ValueError without anchors."""
    if not anchors:
        raise ValueError("a catalog needs at least one anchor folder")
    absolute = Path(os.path.abspath(path))
    for index, anchor in enumerate(anchors):
        if absolute.is_relative_to(anchor):
            return index, absolute.relative_to(anchor).as_posix()
    return 0, Path(os.path.relpath(absolute, anchors[0])).as_posix()


def catalog_document(tiles: Sequence[TileInfo], *, anchors: Sequence[str]) -> dict[str, object]:
    """A JSON-ready record of scanned tiles (CRS definitions stored once), each tile's path
    relative to its anchor (the job's data roots, else the spec's folder)."""
    crs_list = list(dict.fromkeys(t.grid.crs for t in tiles))
    return {
        "header_checks": HEADER_CHECKS,
        "crs": crs_list,
        "roots": [anchor_key(a) for a in anchors],
        "tiles": [_entry(t, crs_list, anchors) for t in tiles],
    }


def _entry(tile: TileInfo, crs_list: list[str], anchors: Sequence[str]) -> dict[str, object]:
    root, path = relative_to_anchor(tile.path, anchors)
    return {
        "root": root,
        "path": path,
        "tile": tile.tile_id,
        "crs": crs_list.index(tile.grid.crs),
        "transform": list(tile.grid.transform),
        "width": tile.grid.width,
        "height": tile.grid.height,
        "nodata": tile.nodata,
        "dtype": tile.dtype,
        "size": tile.size_bytes,
        "mtime_ns": tile.mtime_ns,
        "ctime_ns": tile.ctime_ns,
        "inode": tile.inode,
        "fingerprint": tile.fingerprint,
    }


def headers_checked(document: Mapping[str, Any]) -> bool:
    """True when a catalog_document's tiles passed the header checks a scan makes today."""
    return document.get("header_checks") == HEADER_CHECKS


def tiles_from_catalog(
    document: Mapping[str, Any], *, anchors: Sequence[str]
) -> dict[str, TileInfo]:
    """Absolute path -> TileInfo from a catalog_document, its relative paths resolved against
    anchors (the re-check's own data roots, else its spec's folder). Entries that cannot be
    resolved or read are left out (those tiles are scanned again)."""
    current = {anchor_key(a): a for a in anchors}
    keys = document.get("roots")
    folders = [current.get(k) for k in keys] if isinstance(keys, list) else []
    crs_list = document.get("crs", [])
    entries = document.get("tiles")
    out: dict[str, TileInfo] = {}
    for entry in entries if isinstance(entries, list) else []:
        try:
            path = _absolute(entry, folders)
            if path is not None:
                out[path] = _tile(entry, path, crs_list)
        except (KeyError, IndexError, TypeError, ValueError):
            continue  # a damaged entry: its tile is scanned again
    return out


def _absolute(entry: Mapping[str, Any], folders: list[str | None]) -> str | None:
    """The entry's absolute path, or None when it cannot be resolved here."""
    raw = entry["path"]
    if not isinstance(raw, str):
        return None
    if "root" not in entry:  # written before paths were relative: absolute as it stands
        return raw if os.path.isabs(raw) else None
    root = entry["root"]
    if not isinstance(root, int) or not 0 <= root < len(folders) or os.path.isabs(raw):
        return None
    folder = folders[root]
    return None if folder is None else os.path.normpath(os.path.join(folder, raw))


def _tile(entry: Mapping[str, Any], path: str, crs_list: Sequence[str]) -> TileInfo:
    grid = Grid(crs_list[entry["crs"]], tuple(entry["transform"]), entry["width"], entry["height"])  # type: ignore[arg-type]
    return TileInfo(
        tile_id=entry["tile"],
        path=path,
        grid=grid,
        nodata=entry["nodata"],
        dtype=entry["dtype"],
        size_bytes=entry["size"],
        fingerprint=entry["fingerprint"],
        mtime_ns=entry["mtime_ns"],
        # ctime and inode are absent from catalogs written before: such a file is hashed again
        ctime_ns=entry.get("ctime_ns"),
        inode=entry.get("inode"),
    )
