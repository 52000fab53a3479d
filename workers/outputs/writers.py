"""Write ``results.zarr``: the tile, region and strata tables and the georeferenced dh
overview (its layout: workers/outputs/layout.py). The I/O edge at the end of the pipeline; the
output folder around it is workers/outputs/folder.py.
"""

from __future__ import annotations

import math
import shutil
import warnings
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import dask.array as da
import numpy as np
import rioxarray  # noqa: F401 - registers the .rio accessor
import xarray as xr
import zarr
from numpy.typing import NDArray

from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.outputs.folder import link_or_copy
from demaudit.workers.outputs.layout import (
    OVERVIEW_ARRAY,
    OVERVIEW_GROUP,
    UNCONSOLIDATED_GROUPS,
    ZARR_NAME,
    partial_store,
)
from demaudit.workers.outputs.overview_block import OverviewTarget, write_block
from demaudit.workers.outputs.overview_carry import fill_cells, overlaps_by_owner
from demaudit.workers.stats.summary import STAT_KEYS


@dataclass(frozen=True)
class OverviewLayout:
    """Where each test tile's overview block goes in the mosaic of all tiles."""

    crs: str
    transform: tuple[float, float, float, float, float, float]
    width: int
    height: int
    factor: int
    tile_block: int
    offsets: Mapping[str, tuple[int, int]]  # tile id -> (row, col) of its block in the mosaic
    #: tiles whose block shares a chunk of the mosaic with another tile's block (tiles of other
    #: sizes, overlaps): their blocks are written by the client, one at a time, never by two
    #: workers at once (a chunk is rewritten whole: one of two concurrent writes would be lost)
    shared_chunks: frozenset[str] = frozenset()


def overview_layout(tiles: Sequence[TileInfo], *, factor: int) -> OverviewLayout | None:
    """A mosaic grid for the overview, decimated by the largest divisor of the tiling <= factor.

    None when the test tiles do not share one CRS and one north-up pixel grid.
    """
    if not tiles:
        return None
    first = tiles[0].grid
    a, b, _, d, e, _ = first.transform
    if b != 0 or d != 0 or any(t.grid.crs != first.crs for t in tiles):
        return None
    if any(t.grid.transform[0] != a or t.grid.transform[4] != e for t in tiles):
        return None
    left = min(t.grid.transform[2] for t in tiles)
    top = max(t.grid.transform[5] for t in tiles)
    pixel_offsets = {}
    for t in tiles:
        col, row = (t.grid.transform[2] - left) / a, (t.grid.transform[5] - top) / e
        if abs(col - round(col)) > 1e-6 or abs(row - round(row)) > 1e-6:
            return None
        pixel_offsets[t.tile_id] = (round(row), round(col))
    sizes = [t.grid.width for t in tiles] + [t.grid.height for t in tiles]
    common = math.gcd(*sizes, *[v for rc in pixel_offsets.values() for v in rc])
    factor = max(f for f in range(1, factor + 1) if common % f == 0)
    width = max(c + t.grid.width for t, (_, c) in zip(tiles, pixel_offsets.values(), strict=True))
    height = max(r + t.grid.height for t, (r, _) in zip(tiles, pixel_offsets.values(), strict=True))
    block = max(min(sizes) // factor, 1)
    windows = {
        t.tile_id: (r // factor, c // factor, t.grid.height // factor, t.grid.width // factor)
        for t, (r, c) in zip(tiles, pixel_offsets.values(), strict=True)
    }
    return OverviewLayout(
        crs=first.crs,
        transform=(a * factor, 0.0, left, 0.0, e * factor, top),
        width=width // factor,
        height=height // factor,
        factor=factor,
        tile_block=block,
        offsets={k: (r // factor, c // factor) for k, (r, c) in pixel_offsets.items()},
        shared_chunks=_sharing_chunks(windows, block),
    )


def _sharing_chunks(windows: Mapping[str, tuple[int, int, int, int]], block: int) -> frozenset[str]:
    """The tiles whose window (row, col, height, width in overview cells) touches a chunk
    (block x block cells) that another tile's window touches too."""
    owners: dict[tuple[int, int], list[str]] = {}
    for tile_id, (row, col, height, width) in windows.items():
        for i in range(row // block, (row + max(height, 1) - 1) // block + 1):
            for j in range(col // block, (col + max(width, 1) - 1) // block + 1):
                owners.setdefault((i, j), []).append(tile_id)
    return frozenset(t for ids in owners.values() if len(ids) > 1 for t in ids)


def overview_axes(layout: OverviewLayout) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Cell-centre x (one per column) and y (one per row) of the overview grid, in its CRS."""
    a, _, c, _, e, f = layout.transform
    x = c + a * (np.arange(layout.width, dtype=np.float64) + 0.5)
    y = f + e * (np.arange(layout.height, dtype=np.float64) + 0.5)
    return x.astype(np.float64), y.astype(np.float64)


def blank_overview(layout: OverviewLayout) -> da.Array:
    """A NaN overview (float32, lazy), chunked one tile block a chunk so that each tile's block
    is written alone."""
    return da.full(
        (layout.height, layout.width),
        np.nan,
        dtype=np.float32,
        chunks=(layout.tile_block, layout.tile_block),
    )


@contextmanager
def _quiet_zarr() -> Iterator[None]:
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*Consolidated metadata.*")
        yield


class ResultsStore:
    """Writes one job's ``results.zarr``; overview blocks are written as tiles finish.

    The store is built as ``results.zarr.partial`` and replaces an earlier ``results.zarr`` only
    in :meth:`finish`. The runner writes it inside a staged output folder (folder.staged_folder),
    which keeps the whole earlier result, not only its store, intact when a job fails.
    """

    def __init__(self, out_dir: Path, layout: OverviewLayout | None) -> None:
        self.final_path = Path(out_dir) / ZARR_NAME
        self.path = partial_store(self.final_path)
        if self.path.exists():
            shutil.rmtree(self.path)
        self.layout = layout
        self._overview_array: Any = None
        if layout is not None:
            self._create_overview(layout)

    def _create_overview(self, layout: OverviewLayout) -> None:
        x, y = overview_axes(layout)
        blank = blank_overview(layout)
        dh = xr.DataArray(blank, dims=("y", "x"), coords={"y": y, "x": x}, name=OVERVIEW_ARRAY)
        dh.attrs.update(long_name="dh, test minus reference (block mean)", units="m")
        dh = dh.rio.write_crs(layout.crs).rio.write_transform(_affine(layout.transform))
        dh.encoding["_FillValue"] = np.float32(np.nan)
        with _quiet_zarr():
            dh.to_dataset().to_zarr(  # type: ignore[call-overload]
                self.path,
                group=OVERVIEW_GROUP,
                mode="w",
                compute=False,
                zarr_format=3,
                consolidated=False,
            )

    def overview_target(self, tile_id: str) -> OverviewTarget | None:
        """Where the tile's overview block goes (for the worker that makes it); None without
        an overview mosaic, for a tile outside it, or for one whose block shares a chunk with
        another tile's (OverviewLayout.shared_chunks: the client writes those)."""
        if self.layout is None or tile_id in self.layout.shared_chunks:
            return None
        return self._target(tile_id)

    def _target(self, tile_id: str) -> OverviewTarget | None:
        if self.layout is None or tile_id not in self.layout.offsets:
            return None
        row, col = self.layout.offsets[tile_id]
        path = str(self.path / OVERVIEW_GROUP / OVERVIEW_ARRAY)
        return OverviewTarget(path, row, col, self.layout.height, self.layout.width)

    def write_overview(self, tile_id: str, block: NDArray[np.float32] | None) -> None:
        """Write one tile's overview block in place. A block that shares chunks with other
        tiles' (OverviewLayout.shared_chunks) keeps the values they wrote where it is NaN: an
        overlap counted by the first-listed tile stays filled whichever tile arrives last."""
        target = self._target(tile_id)
        if target is None or block is None:
            return
        array = self._overview()
        if self.layout is not None and tile_id in self.layout.shared_chunks:
            rows, cols = target.window(block.shape)
            part = block[: rows.stop - rows.start, : cols.stop - cols.start]
            block = np.where(np.isnan(part), array[rows, cols], part).astype(np.float32)
        write_block(array, target, block)

    def carry_overview(
        self,
        baseline: Path,
        keep: Mapping[str, Sequence[float]],
        blank: Mapping[str, Sequence[float]],
        order: Mapping[str, int] | None = None,
    ) -> None:
        """Bring over the overview blocks of the tiles in keep (tile id -> bounds) from an
        earlier results.zarr; blank the footprints in blank (tile id -> bounds: tiles recomputed
        or gone). Where footprints overlap, the first-listed tile (``order``: each test tile's
        place in this run's listing; a tile missing from it is gone) holds the pixels: a kept
        tile keeps its values where it comes first, a recomputed tile's strip is blank for its
        new block (tile_overlaps' rule).

        When both overviews share one grid, the chunk files are linked (or copied) wholesale and
        only the blanked footprints are written: the cost does not grow with the tiles kept.
        Otherwise each kept tile's block is read and written.
        """
        if self.layout is None or not keep:
            return
        try:
            source: Any = zarr.open_group(str(baseline / OVERVIEW_GROUP), mode="r")
            old, old_x, old_y = source[OVERVIEW_ARRAY], source["x"][:], source["y"][:]
        except (KeyError, FileNotFoundError, OSError):
            return
        new = self._overview()
        x, y = overview_axes(self.layout)
        kept_first, blank_first = overlaps_by_owner(keep, blank, order or {})
        if (
            old.shape == new.shape
            and old.chunks == new.chunks
            and np.array_equal(old_x, x)
            and np.array_equal(old_y, y)
        ):
            chunks = baseline / OVERVIEW_GROUP / OVERVIEW_ARRAY / "c"
            if chunks.is_dir():
                shutil.copytree(
                    chunks,
                    self.path / OVERVIEW_GROUP / OVERVIEW_ARRAY / "c",
                    dirs_exist_ok=True,
                    copy_function=link_or_copy,
                )
            for bounds in blank.values():
                fill_cells(new, x, y, bounds, None)
            for bounds in kept_first:  # the kept tile holds these: its values back
                fill_cells(new, x, y, bounds, (old, old_x, old_y))
            return
        for bounds in keep.values():
            fill_cells(new, x, y, bounds, (old, old_x, old_y))
        for bounds in blank_first:  # the recomputed tile holds these: blank for its new block
            fill_cells(new, x, y, bounds, None)

    def _overview(self) -> Any:
        if self._overview_array is None:
            self._overview_array = zarr.open_array(
                str(self.path / OVERVIEW_GROUP / OVERVIEW_ARRAY), mode="r+", use_consolidated=False
            )
        return self._overview_array

    def finish(self) -> None:
        """Consolidate the metadata and put the store in place of any earlier results.zarr.

        The stored summaries (a group per tile, with large attributes) are moved aside while the
        root is consolidated: gathering them would cost every run time in proportion to the
        archive and make the root's metadata grow with it. Open them directly, without
        consolidated metadata (see workers/outputs/summary_store.py).
        """
        aside = self.path.with_name(self.path.name + ".aside")
        if aside.exists():
            shutil.rmtree(aside)
        moved = [name for name in UNCONSOLIDATED_GROUPS if (self.path / name).is_dir()]
        for name in moved:
            aside.mkdir(exist_ok=True)
            (self.path / name).rename(aside / name)
        with _quiet_zarr():
            zarr.consolidate_metadata(str(self.path))
        for name in moved:
            (aside / name).rename(self.path / name)
        if aside.exists():
            aside.rmdir()
        if self.final_path.exists():
            shutil.rmtree(self.final_path)
        self.path.rename(self.final_path)
        self.path = self.final_path

    def write_tables(self, tables: Mapping[str, xr.Dataset]) -> None:
        """Write tables (group name -> dataset), e.g. tiles, regions, strata."""
        for group, table in tables.items():
            mode: Literal["a", "w"] = "a" if self.path.exists() else "w"
            with _quiet_zarr():
                table.to_zarr(self.path, group=group, mode=mode, zarr_format=3, consolidated=False)


def overview_carries(layout: OverviewLayout | None, baseline: Path) -> bool:
    """Whether an earlier results.zarr's dh overview can be carried into one on layout: same
    cell size, cell edges on the same lines (True when there is no overview to fill)."""
    if layout is None:
        return True
    try:
        group: Any = zarr.open_group(str(Path(baseline) / OVERVIEW_GROUP), mode="r")
        x, y = np.asarray(group["x"][:]), np.asarray(group["y"][:])
    except (KeyError, FileNotFoundError, OSError):
        return False
    a, _, c, _, e, f = layout.transform
    if x.size < 2 or y.size < 2 or not (np.isclose(x[1] - x[0], a) and np.isclose(y[1] - y[0], e)):
        return False
    cols, rows = (x[0] - (c + a / 2)) / a, (y[0] - (f + e / 2)) / e
    return bool(np.isclose(cols, round(cols)) and np.isclose(rows, round(rows)))


def _affine(t: tuple[float, ...]):  # type: ignore[no-untyped-def]
    from affine import Affine

    return Affine(*t[:6])


def statistics_table(
    dim: str,
    ids: Sequence[str],
    stats: Sequence[Mapping[str, Any]],
    coords: Mapping[str, Any],
) -> xr.Dataset:
    """One variable per statistic along dim; None becomes NaN (count stays an integer)."""
    data: dict[str, Any] = {}
    for key in STAT_KEYS:
        values = [s.get(key) for s in stats]
        if key == "count":
            data[key] = (dim, np.array([v or 0 for v in values], dtype=np.int64))
        else:
            data[key] = (
                dim,
                np.array([np.nan if v is None else v for v in values], dtype=np.float64),
            )
    all_coords: dict[str, Any] = {dim: np.array(list(ids), dtype=object)}
    for name, column in coords.items():
        arr = np.array(list(column))
        all_coords[name] = (dim, arr.astype(object) if arr.dtype.kind in "UO" else arr)
    ds = xr.Dataset(data, coords=all_coords)
    for key in STAT_KEYS:
        if key != "count":
            ds[key].attrs["units"] = "m"
    return ds


def strata_table(
    areas: Sequence[str], strata: Sequence[str], stats: Mapping[tuple[str, str], Mapping[str, Any]]
) -> xr.Dataset:
    """Statistics on dims (area, stratum); NaN (count 0) where a combination holds no pixel."""
    data: dict[str, Any] = {}
    for key in STAT_KEYS:
        grid = np.full((len(areas), len(strata)), 0 if key == "count" else np.nan)
        for i, area in enumerate(areas):
            for j, stratum in enumerate(strata):
                value = stats.get((area, stratum), {}).get(key)
                if value is not None:
                    grid[i, j] = value
        data[key] = (("area", "stratum"), grid.astype(np.int64 if key == "count" else np.float64))
    coords = {
        "area": np.array(list(areas), dtype=object),
        "stratum": np.array(list(strata), dtype=object),
    }
    return xr.Dataset(data, coords=coords)
