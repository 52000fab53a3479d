"""Tile catalog: what each tile is (bounds, CRS, resolution, nodata, fingerprint) and which
reference tiles overlap a test tile.

``scan_tile`` is the only function here that touches files; the index is pure.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import rasterio
from pyproj import CRS
from rasterio.errors import RasterioIOError
from rasterio.warp import transform_bounds
from shapely import STRtree, box

from workers.errors import MissingCRSError, TileReadError
from workers.grid import Grid

_FINGERPRINT_BLOCK = 1 << 20


@dataclass(frozen=True)
class TileInfo:
    """What the catalog knows of one tile. ``fingerprint`` is the SHA-256 of the file's bytes."""

    tile_id: str
    path: str
    grid: Grid
    nodata: float | None
    dtype: str
    size_bytes: int
    fingerprint: str

    @property
    def bounds(self) -> tuple[float, float, float, float]:
        return self.grid.bounds


@dataclass(frozen=True)
class ScanFailure:
    """A tile the catalog could not read, with the reason."""

    tile_id: str
    path: str
    reason: str


def tile_id_of(path: str | Path) -> str:
    """A tile's id: its file name without extension."""
    return Path(path).stem


def scan_tile(path: str | Path) -> TileInfo | ScanFailure:
    """Read a tile's header and fingerprint; a failure is returned, not raised."""
    try:
        return _scan(Path(path))
    except (TileReadError, MissingCRSError) as exc:
        return ScanFailure(tile_id_of(path), str(path), str(exc))


def _scan(path: Path) -> TileInfo:
    try:
        with rasterio.open(path) as src:
            if src.crs is None:
                raise MissingCRSError(f"tile {path.name} has no CRS")
            if src.count < 1:
                raise TileReadError(f"tile {path.name} has no bands")
            grid = Grid(
                crs=src.crs.to_wkt(),
                transform=tuple(src.transform)[:6],  # type: ignore[arg-type]
                width=src.width,
                height=src.height,
            )
            nodata = None if src.nodata is None else float(src.nodata)
            dtype = src.dtypes[0]
    except RasterioIOError as exc:
        raise TileReadError(f"tile {path.name} cannot be opened: {exc}") from None
    return TileInfo(
        tile_id=tile_id_of(path),
        path=str(path),
        grid=grid,
        nodata=nodata,
        dtype=dtype,
        size_bytes=path.stat().st_size,
        fingerprint=file_fingerprint(path),
    )


def file_fingerprint(path: Path) -> str:
    """SHA-256 of a file's content (touching a file does not change it)."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(_FINGERPRINT_BLOCK):
            digest.update(block)
    return digest.hexdigest()


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
        source = CRS.from_wkt(grid.crs)
        for crs, (members, tree) in self._groups.items():
            bounds = grid.bounds
            if not CRS.from_wkt(crs).equals(source):
                bounds = transform_bounds(source, CRS.from_wkt(crs), *bounds, densify_pts=21)
            query = box(*bounds)
            hits = tree.query(query, predicate="intersects")
            found.extend(
                members[i]
                for i in np.sort(hits)
                if box(*members[i].bounds).intersection(query).area > 0
            )
        return found
