"""results.zarr: overview blocks carried over from a baseline, consolidated metadata."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import xarray as xr
import zarr
from pyproj import CRS

from demaudit.workers.inputs.catalog import TileInfo
from demaudit.workers.outputs.layout import TILE_SUMMARIES_GROUP
from demaudit.workers.outputs.summary_store import TileSummaryStore
from demaudit.workers.outputs.writers import (
    ResultsStore,
    overview_carries,
    overview_layout,
    statistics_table,
)
from demaudit.workers.stats.summary import summarise
from demaudit.workers.tile.grid import Grid

UTM = CRS.from_epsg(32632).to_wkt()
PIXELS, SIZE = 40, 2.0


def tiles(cols: int, rows: int) -> list[TileInfo]:
    out = []
    for row in range(rows):
        for col in range(cols):
            transform = (SIZE, 0.0, col * PIXELS * SIZE, 0.0, -SIZE, -row * PIXELS * SIZE)
            grid = Grid(UTM, transform, PIXELS, PIXELS)  # type: ignore[arg-type]
            out.append(TileInfo(f"t{col}{row}", "/dev/null", grid, None, "float32", 0, ""))
    return out


def build(path, layout_tiles, blocks, factor=4):
    layout = overview_layout(layout_tiles, factor=factor)
    store = ResultsStore(path, layout)
    for tile_id, value in blocks.items():
        store.write_overview(tile_id, np.full((PIXELS // 4, PIXELS // 4), value, np.float32))
    return store


def overview(path) -> np.ndarray:
    return np.asarray(zarr.open_array(str(path / "results.zarr" / "dh_overview" / "dh"))[...])


@pytest.mark.parametrize("same_grid", [True, False])
def test_carried_overview_equals_writing_every_block(tmp_path, same_grid):
    grid = tiles(3, 2)
    values = {t.tile_id: float(i + 1) for i, t in enumerate(grid)}
    build(tmp_path / "base", grid, values).finish()
    bounds = {t.tile_id: list(t.bounds) for t in grid}
    # the next run: t10 recomputed (new value); when not same_grid, a new column of tiles
    now = grid if same_grid else tiles(4, 2)
    new_values = dict(values) | {"t10": 42.0}
    keep = {k: b for k, b in bounds.items() if k != "t10"}
    store = build(tmp_path / "night", now, {})
    store.carry_overview(tmp_path / "base" / "results.zarr", keep, {"t10": bounds["t10"]})
    store.write_overview("t10", np.full((PIXELS // 4, PIXELS // 4), 42.0, np.float32))
    store.finish()
    build(tmp_path / "fresh", now, new_values).finish()
    night, fresh = overview(tmp_path / "night"), overview(tmp_path / "fresh")
    assert np.array_equal(night, fresh, equal_nan=True)
    assert np.nanmax(overview(tmp_path / "base")) == 6.0  # the baseline is as it was


def test_a_tile_gone_or_failed_is_blank_not_stale(tmp_path):
    grid = tiles(2, 2)
    build(tmp_path / "base", grid, {t.tile_id: 1.0 for t in grid}).finish()
    store = build(tmp_path / "night", grid, {})
    keep = {t.tile_id: list(t.bounds) for t in grid[1:]}
    store.carry_overview(tmp_path / "base" / "results.zarr", keep, {"t00": list(grid[0].bounds)})
    store.finish()
    block = overview(tmp_path / "night")[: PIXELS // 4, : PIXELS // 4]
    assert np.isnan(block).all() and np.nansum(overview(tmp_path / "night")) > 0


def overlapping(shift_cols: int, *, third: bool = False) -> list[TileInfo]:
    """Two tiles side by side, the second shifted left over the first by shift_cols pixels
    (and a third below the first, touching neither, when asked)."""
    lefts = [(0.0, 0.0), ((PIXELS - shift_cols) * SIZE, 0.0)] + ([(0.0, -PIXELS * SIZE)] * third)
    out = []
    for i, (left, top) in enumerate(lefts):
        grid = Grid(UTM, (SIZE, 0.0, left, 0.0, -SIZE, top), PIXELS, PIXELS)  # type: ignore[arg-type]
        out.append(TileInfo(f"t{i}0", "/dev/null", grid, None, "float32", 0, ""))
    return out


def block_of(value: float, nan_cols: slice | None = None) -> np.ndarray:
    block = np.full((PIXELS // 4, PIXELS // 4), value, np.float32)
    if nan_cols is not None:
        block[:, nan_cols] = np.nan  # pixels counted by the first-listed tile: left out
    return block


@pytest.mark.parametrize("same_grid", [True, False])
@pytest.mark.parametrize("recomputed", ["t00", "t10"])
def test_a_recheck_keeps_the_overlap_of_the_first_listed_tile(tmp_path, recomputed, same_grid):
    """Tiles overlapping by 8 pixels (2 overview cells): the overlap is the first-listed tile's
    (t00's). Re-checking either tile gives the map a fresh run would draw, also when t00's new
    block has a void in the overlap (and when a new tile changes the overview's grid)."""
    grid = overlapping(8)
    now = grid if same_grid else overlapping(8, third=True)
    overlap = slice(0, 2)  # t10's first two overview columns lie over t00
    void = slice(PIXELS // 4 - 1, PIXELS // 4)  # t00's last column: inside the overlap
    first = {"t00": block_of(1.0), "t10": block_of(2.0, overlap)}
    again = dict(first) | {recomputed: block_of(5.0, overlap if recomputed == "t10" else void)}
    new_tiles = {} if same_grid else {"t20": block_of(7.0)}
    order = {"t00": 0, "t10": 1, "t20": 2}

    def run(folder, tiles_now, blocks, carry=None):
        store = ResultsStore(tmp_path / folder, overview_layout(tiles_now, factor=4))
        if carry is not None:
            keep = {t.tile_id: list(t.bounds) for t in grid if t.tile_id != recomputed}
            gone = {recomputed: list(next(t for t in grid if t.tile_id == recomputed).bounds)}
            store.carry_overview(carry, keep, gone, order)
        for tile_id in blocks:  # the first-listed tile last: the harder arrival order
            store.write_overview(tile_id, blocks[tile_id])
        store.finish()
        return overview(tmp_path / folder)

    run("base", grid, {"t10": first["t10"], "t00": first["t00"]})
    base = tmp_path / "base" / "results.zarr"
    night = run("night", now, {recomputed: again[recomputed], **new_tiles}, carry=base)
    fresh = run("fresh", now, {"t10": again["t10"], "t00": again["t00"], **new_tiles})
    assert np.array_equal(night, fresh, equal_nan=True)
    assert np.nanmin(night) == (1.0 if recomputed == "t10" else 2.0)  # the kept tile's values


def test_tables_open_consolidated_and_summaries_stay_out_of_it(tmp_path):
    grid = tiles(2, 1)
    store = build(tmp_path, grid, {"t00": 1.0})
    TileSummaryStore(store.path, mode="a").write("t00", {("*", ""): summarise(np.arange(9.0))})
    store.write_tables({"tiles": statistics_table("tile", ["t00"], [{"count": 9}], {})})
    store.finish()
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)  # xarray warns when it falls back
        assert int(xr.open_zarr(tmp_path / "results.zarr", group="tiles")["count"][0]) == 9
    root = zarr.open_group(str(tmp_path / "results.zarr"), mode="r")
    listed = root.metadata.consolidated_metadata.metadata
    assert "tiles" in listed and "dh_overview" in listed and TILE_SUMMARIES_GROUP not in listed
    assert TileSummaryStore(tmp_path / "results.zarr").read("t00")[0][("*", "")].count == 9


def test_overview_carries_only_onto_the_same_cells(tmp_path):
    grid = tiles(3, 2)
    build(tmp_path / "base", grid, {}).finish()
    base = tmp_path / "base" / "results.zarr"
    assert overview_carries(overview_layout(grid, factor=4), base)
    assert overview_carries(overview_layout(tiles(4, 3), factor=4), base)  # more tiles, same cells
    assert not overview_carries(overview_layout(grid, factor=2), base)  # other cell size
    assert overview_carries(None, base)  # nothing to fill
    assert not overview_carries(overview_layout(grid, factor=4), tmp_path / "nowhere.zarr")


def strip(widths: list[int], *, overlap: int = 0) -> list[TileInfo]:
    """One row of PIXELS-high tiles of the given widths, each overlapping the last by overlap."""
    out, x = [], 0
    for i, width in enumerate(widths):
        grid = Grid(UTM, (SIZE, 0.0, x * SIZE, 0.0, -SIZE, 0.0), width, PIXELS)  # type: ignore[arg-type]
        out.append(TileInfo(f"s{i}", "/dev/null", grid, None, "float32", 0, ""))
        x += width - overlap
    return out


def chunks_of(store: ResultsStore, tile: TileInfo) -> set[tuple[int, int]]:
    """The chunks of the overview a worker writing the tile's block rewrites."""
    target = store.overview_target(tile.tile_id)
    assert target is not None and store.layout is not None
    f, b = store.layout.factor, store.layout.tile_block
    rows, cols = target.window((tile.grid.height // f, tile.grid.width // f))
    return {
        (i, j)
        for i in range(rows.start // b, (rows.stop - 1) // b + 1)
        for j in range(cols.start // b, (cols.stop - 1) // b + 1)
    }


@pytest.mark.parametrize(
    ("layout_tiles", "by_workers"),
    [
        (tiles(3, 2), 6),  # one chunk per tile: every block is written by its worker
        (strip([40, 40, 80, 40]), 4),  # chunk edges on every tile edge
        (strip([60, 40, 40]), 0),  # the 60-pixel tile ends inside a chunk the next one starts
        (strip([40, 60, 40, 40]), 1),  # only the first tile's chunks are its own
        (strip([40, 40, 40], overlap=20), 0),  # overlapping tiles
    ],
)
def test_no_two_workers_write_one_chunk_of_the_overview(tmp_path, layout_tiles, by_workers):
    # zarr rewrites a chunk whole: two workers writing blocks into one chunk at once lose one
    # block (seen with two threads on a 30 + 20 pixel strip at factor 5, every time)
    store = ResultsStore(tmp_path, overview_layout(layout_tiles, factor=4))
    written = [t for t in layout_tiles if store.overview_target(t.tile_id) is not None]
    assert len(written) == by_workers
    seen: set[tuple[int, int]] = set()
    for tile in written:
        chunks = chunks_of(store, tile)
        assert not chunks & seen, tile.tile_id
        seen |= chunks
    for tile in layout_tiles:  # the client writes the others, one at a time
        f = store.layout.factor  # type: ignore[union-attr]
        block = np.full((tile.grid.height // f, tile.grid.width // f), 1.0, np.float32)
        store.write_overview(tile.tile_id, block)
    assert np.isfinite(overview_array(store)).all()


def overview_array(store: ResultsStore) -> np.ndarray:
    return np.asarray(zarr.open_array(str(store.path / "dh_overview" / "dh"))[...])


@pytest.mark.parametrize("first", ["s0", "s1"])
def test_an_overlap_keeps_the_heights_of_the_tile_that_counted_it(tmp_path, first):
    # s1's first 20 pixels lie under s0 (listed first), so s1's block is NaN there
    # (catalog.tile_overlaps); the overlap shows s0's values whichever block is written last
    layout_tiles = strip([40, 40], overlap=20)
    store = ResultsStore(tmp_path, overview_layout(layout_tiles, factor=4))
    covered = np.full((10, 10), 2.0, np.float32)
    covered[:, :5] = np.nan
    blocks = {"s0": np.full((10, 10), 1.0, np.float32), "s1": covered}
    for tile_id in (first, "s1" if first == "s0" else "s0"):
        store.write_overview(tile_id, blocks[tile_id])
    want = np.concatenate([np.full((10, 10), 1.0), np.full((10, 5), 2.0)], axis=1)
    np.testing.assert_array_equal(overview_array(store), want)
