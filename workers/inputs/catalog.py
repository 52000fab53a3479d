"""Tile catalog: what each tile is (bounds, CRS, resolution, nodata, fingerprint) and which
reference tiles overlap a test tile.

``scan_tile`` is the only function here that touches files; the index is pure. It opens each
file once through workers/inputs/confine.py: the header, the size and the fingerprint all come from
that one open file, checked against the data roots; a tile that leads outside them fails its scan.
The spatial index is workers/inputs/tile_index.py; catalog.json (written for re-checks and
read back) is workers/inputs/catalog_file.py.
"""

from __future__ import annotations

import hashlib
from collections import Counter
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import shapely
from numpy.typing import NDArray
from rasterio.enums import ColorInterp
from rasterio.errors import RasterioIOError
from shapely import box, segmentize
from shapely.geometry.base import BaseGeometry

from demaudit.workers.errors import DataRootError, MissingCRSError, NotElevationError, TileReadError
from demaudit.workers.inputs.confine import Roots, Stamp, open_confined, shown, stamp_of
from demaudit.workers.inputs.tile_index import TileIndex, same_crs, transformer_between
from demaudit.workers.tile.grid import Grid, centres_in


@dataclass(frozen=True)
class TileInfo:
    """What the catalog knows of one tile. ``fingerprint`` is the SHA-256 of the file's bytes;
    ``roots`` the data roots every read of the file is confined to (None: not confined);
    ``ctime_ns`` and ``inode`` complete its stamp (None: a catalog that did not record them)."""

    tile_id: str
    path: str
    grid: Grid
    nodata: float | None
    dtype: str
    size_bytes: int
    fingerprint: str
    mtime_ns: int = 0
    roots: Roots = None
    ctime_ns: int | None = None
    inode: int | None = None

    @property
    def stamp(self) -> Stamp:
        return (self.size_bytes, self.mtime_ns, self.ctime_ns, self.inode)

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


def unique_tile_ids(
    found: Sequence[TileInfo | ScanFailure],
) -> list[TileInfo | ScanFailure]:
    """found with every id unique: files of the same name in different folders (a re-delivery
    beside the original) become ``<name>@<folder>`` (``@<n>`` appended if still the same)."""
    names = Counter(tile_id_of(f.path) for f in found)
    taken: set[str] = set()
    out = []
    for item in found:
        tile_id = tile_id_of(item.path)
        if names[tile_id] > 1:
            tile_id = f"{tile_id}@{Path(item.path).parent.name}"
        base, n = tile_id, 1
        while tile_id in taken:
            n += 1
            tile_id = f"{base}@{n}"
        taken.add(tile_id)
        out.append(item if tile_id == item.tile_id else replace(item, tile_id=tile_id))
    return out


Known = tuple[Stamp, str]  # an earlier scan's stamp of the file (confine.Stamp), fingerprint


ELEVATION = "elevation"
LANDCOVER = "landcover"
#: Colour interpretations that show a band holds colours, not heights or classes.
_COLOURS = {ColorInterp.red, ColorInterp.green, ColorInterp.blue, ColorInterp.alpha}


def scan_tile(
    path: str | Path, known: Known | None = None, roots: Roots = None, *, kind: str = ELEVATION
) -> TileInfo | ScanFailure:
    """Read a tile's header and fingerprint; a failure is returned, not raised.

    ``known`` is what an earlier scan found for this path: when the file's stamp (size,
    modification and status-change times, inode: confine.Stamp) is unchanged its fingerprint is
    reused, otherwise the content is hashed again (so a touched but unchanged file keeps its
    fingerprint, only costing the hash, and one rewritten with its mtime put back is hashed).

    ``kind`` is ELEVATION (test and reference tiles) or LANDCOVER; a raster that cannot be of
    that kind fails with the reason (see not_of_kind).

    ``roots`` (resolved data roots) confine the read: a file leading outside them fails with
    'leads outside the allowed data roots'; messages show paths relative to their root.
    """
    try:
        return _scan(Path(path), known, kind, roots)
    except (TileReadError, MissingCRSError, DataRootError) as exc:
        return ScanFailure(tile_id_of(path), str(path), str(exc))


def call_each(function: Callable[..., Any], calls: Sequence[tuple[Any, ...]]) -> list[Any]:
    """function(*arguments) for each call, in order: one cluster task for a batch of scans
    (scan_tile returns failures instead of raising, so one bad file spoils no other)."""
    return [function(*arguments) for arguments in calls]


def scan_landcover_tile(
    path: str | Path, known: Known | None = None, roots: Roots = None
) -> TileInfo | ScanFailure:
    """scan_tile for a land-cover raster (a palette is allowed)."""
    return scan_tile(path, known, roots, kind=LANDCOVER)


def not_of_kind(
    *, count: int, dtype: str, colorinterp: Sequence[ColorInterp], has_colormap: bool, kind: str
) -> str | None:
    """Why a raster with this header cannot be an elevation model (or land cover), or None.

    Only clear evidence counts: more than one band, a band whose colour interpretation is red,
    green, blue or alpha (an image), and, for elevation, a palette (colour table). A single band
    of 8-bit or 16-bit integers alone is no evidence: integer DEMs exist. Land cover may carry
    a palette (its classes drawn in colour).
    """
    names = ", ".join(c.name for c in colorinterp)
    what = "an elevation model" if kind == ELEVATION else "a land-cover raster"
    if count > 1:
        return f"{count} bands ({names}) of {dtype}: not {what}, which has one band"
    if set(colorinterp) & _COLOURS:
        return f"a {names} band of {dtype} (an image): not {what}"
    if kind == ELEVATION and (has_colormap or ColorInterp.palette in colorinterp):
        return f"a palette band of {dtype} (colour indices): not {what}"
    return None


def _has_colormap(src: Any) -> bool:
    try:
        src.colormap(1)
    except ValueError:  # rasterio: no colour table for this band
        return False
    return True


def _scan(path: Path, known: Known | None, kind: str, roots: Roots) -> TileInfo:
    try:
        opened = open_confined(path, roots)
    except DataRootError as exc:
        raise DataRootError(f"tile {exc}") from None
    except OSError as exc:
        raise TileReadError(f"tile {shown(path, roots)} cannot be opened: {exc.strerror}") from None
    with opened:
        try:
            with opened.raster() as src:
                grid, nodata, dtype = _header(src, path.name, kind)
        except RasterioIOError as exc:
            reason = opened.clean(str(exc))
            raise TileReadError(f"tile {opened.name} cannot be opened: {reason}") from None
        same = known is not None and known[0] == opened.stamp
        return TileInfo(
            tile_id=tile_id_of(path),
            path=str(path),
            grid=grid,
            nodata=nodata,
            dtype=dtype,
            size_bytes=opened.size,
            fingerprint=known[1] if same and known is not None else opened.sha256(),
            mtime_ns=opened.mtime_ns,
            roots=roots,
            ctime_ns=opened.stamp[2],
            inode=opened.stamp[3],
        )


def _header(src: Any, name: str, kind: str) -> tuple[Grid, float | None, str]:
    """Grid, nodata and data type of an open raster; refusals name the tile."""
    if src.crs is None:
        raise MissingCRSError(f"tile {name} has no CRS")
    if src.count < 1:
        raise TileReadError(f"tile {name} has no bands")
    why = not_of_kind(
        count=src.count,
        dtype=src.dtypes[0],
        colorinterp=src.colorinterp,
        has_colormap=_has_colormap(src),
        kind=kind,
    )
    if why is not None:
        raise NotElevationError(f"tile {name} holds {why}; it was not used")
    grid = Grid(
        crs=src.crs.to_wkt(),
        transform=tuple(src.transform)[:6],  # type: ignore[arg-type]
        width=src.width,
        height=src.height,
    )
    nodata = None if src.nodata is None else float(src.nodata)
    return grid, nodata, src.dtypes[0]


def file_fingerprint(path: Path, *, roots: Roots = None) -> str:
    """SHA-256 of a file's content (touching a file does not change it), read from one open
    file checked against roots (workers/inputs/confine.py; DataRootError when it leads outside)."""
    with open_confined(path, roots) as opened:
        return opened.sha256()


#: Status of a test tile whose every pixel lies in earlier-listed test tiles (not audited).
SUPERSEDED = "superseded"


@dataclass(frozen=True)
class Footprint:
    """The area of an earlier-listed test tile, in the CRS of a later test tile it overlaps."""

    tile_id: str
    geometry: BaseGeometry


@dataclass(frozen=True)
class Overlap:
    """A test tile that earlier-listed test tiles overlap: their footprints in its CRS, and how
    many of its pixel centres they hold."""

    tile_id: str
    covered: tuple[Footprint, ...]
    covered_px: int
    pixels: int

    @property
    def superseded(self) -> bool:
        return self.covered_px == self.pixels


def tile_overlaps(tests: Sequence[TileInfo]) -> dict[str, Overlap]:
    """Test tiles whose footprints overlap earlier-listed ones (re-delivered copies, or
    deliveries cut differently), by tile id.

    The rule: every ground pixel is counted once, in the first-listed test tile whose footprint
    holds the pixel's centre. The listing order is the spec's: its entries in order, and the
    files of a folder or glob sorted by path (checkpoints follow the same rule: the lowest tile
    index wins). A later tile's pixels whose centres lie in an earlier tile's footprint are left
    out of every statistic (audit_tile's ``covered``); a tile left with none is SUPERSEDED and
    not audited. The footprint is the tile's whole extent, voids included: a void of the
    earlier tile is not filled from the later one. Footprints in another CRS are reprojected
    with densified edges, so tiles in different CRSs follow the same rule. Touching is not
    overlapping; an overlap holding no pixel centre is ignored.
    """
    index = TileIndex(tests)
    order = {t.path: i for i, t in enumerate(tests)}
    found: dict[str, Overlap] = {}
    for i, tile in enumerate(tests):
        earlier = [o for o in index.overlapping(tile.grid) if order[o.path] < i]
        if not earlier:
            continue
        feet = tuple(Footprint(o.tile_id, _footprint(o, tile.grid.crs)) for o in earlier)
        mask = covered_mask(tile.grid, feet)
        covered = int(np.count_nonzero(mask))
        if covered:
            found[tile.tile_id] = Overlap(tile.tile_id, feet, covered, mask.size)
    return found


def covered_mask(grid: Grid, covered: Sequence[Footprint]) -> NDArray[np.bool_]:
    """True for pixels of grid whose centre lies in one of the footprints (grid's CRS)."""
    return centres_in([f.geometry for f in covered], grid)


def superseded_reason(covered: Sequence[Footprint]) -> str:
    """Why a tile wholly covered by earlier-listed tiles is not audited."""
    ids = ", ".join(dict.fromkeys(f.tile_id for f in covered))
    return (
        f"every pixel lies in earlier-listed test tile(s) {ids}, which count them (the first "
        "listed tile counts a ground pixel once)"
    )


def overlap_cautions(overlaps: Mapping[str, Overlap], *, shown: int = 10) -> list[str]:
    """One caution listing the overlapping test tiles (none without overlaps)."""
    if not overlaps:
        return []
    items = []
    for o in list(overlaps.values())[:shown]:
        ids = ", ".join(dict.fromkeys(f.tile_id for f in o.covered))
        state = f" (status {SUPERSEDED})" if o.superseded else ""
        items.append(f"{o.tile_id}: {o.covered_px:,} of {o.pixels:,} pixels in {ids}{state}")
    more = f"; and {len(overlaps) - shown} more" if len(overlaps) > shown else ""
    return [
        f"{len(overlaps)} test tile(s) overlap earlier-listed test tiles; each ground pixel was "
        "counted once, in the first-listed tile covering it (spec order, paths sorted within a "
        f"folder or glob): {'; '.join(items)}{more}"
    ]


def overlap_sources(overlaps: Mapping[str, Overlap]) -> dict[str, str]:
    """For re-checks, as extra 'sources': ``covered:<tile>:<earlier tile>`` -> a digest of that
    footprint. A tile whose covering tiles, or their footprints, changed is then recomputed."""
    return {
        f"covered:{tile_id}:{f.tile_id}": hashlib.sha256(f.geometry.wkb).hexdigest()[:16]
        for tile_id, o in overlaps.items()
        for f in o.covered
    }


def overlap_sources_of(overlaps: Mapping[str, Overlap], tile_id: str) -> list[str]:
    """The keys of overlap_sources that concern one test tile."""
    found = overlaps.get(tile_id)
    return [f"covered:{tile_id}:{f.tile_id}" for f in found.covered] if found else []


def _footprint(tile: TileInfo, crs: str) -> BaseGeometry:
    """The tile's extent as a polygon in crs (edges densified when reprojected)."""
    frame = box(*tile.bounds)
    if tile.grid.crs == crs or same_crs(tile.grid.crs, crs):
        return frame
    left, bottom, right, top = tile.bounds
    dense = segmentize(frame, max(right - left, top - bottom) / 64)
    transformer = transformer_between(tile.grid.crs, crs)

    def to_target(xy: NDArray[np.float64]) -> NDArray[np.float64]:
        return np.column_stack(transformer.transform(xy[:, 0], xy[:, 1]))

    return shapely.transform(dense, to_target)


def unchanged(known: TileInfo, path: Path) -> bool:
    """True when the file still has the stamp (confine.Stamp) it had when scanned."""
    try:
        return stamp_of(path.stat()) == known.stamp
    except OSError:
        return False
