"""audit_and_store: the worker writes a tile's summaries into the results store itself."""

from __future__ import annotations

from pathlib import Path

import numpy as np
from rasterio.transform import from_origin

from demaudit.workers.inputs.catalog import TileInfo, scan_tile
from demaudit.workers.outputs.summary_store import TileSummaryStore, entries_of
from demaudit.workers.outputs.writers import ResultsStore, overview_layout
from demaudit.workers.tile.task import OK, TileOptions, audit_and_store, audit_tile
from tests.conftest import UTM32, terrain, write_tif


def tile_pair(folder: Path):
    transform = from_origin(480_000, 6_230_000, 5.0, 5.0)
    rows, cols = np.mgrid[0:40, 0:50]
    e, n = 480_000 + (cols + 0.5) * 5.0, 6_230_000 - (rows + 0.5) * 5.0
    z = terrain(e, n)
    rng = np.random.default_rng(0)
    test = write_tif(
        folder / "t.tif", z + rng.normal(0.2, 0.3, z.shape), crs=UTM32, transform=transform
    )
    ref = write_tif(folder / "r.tif", z, crs=UTM32, transform=transform)
    return scan_tile(test), scan_tile(ref)


def test_the_worker_stores_what_the_client_would(tmp_path: Path) -> None:
    test, ref = tile_pair(tmp_path)
    zarr_path = tmp_path / "results.zarr"
    client_side = TileSummaryStore(zarr_path, mode="a")  # as the runner opens it
    result = audit_and_store(test, [ref], [], TileOptions(), summaries_to=str(zarr_path))
    assert result.status == OK and result.summaries_stored
    assert client_side.has(test.tile_id)
    stored, excluded = client_side.read(test.tile_id)
    want = entries_of(audit_tile(test, [ref], [], TileOptions()))
    assert excluded == result.excluded
    assert set(stored) == set(want)
    for key, summary in want.items():
        assert stored[key].count == summary.count
        np.testing.assert_array_equal(stored[key].bins, summary.bins)
        np.testing.assert_array_equal(stored[key].counts, summary.counts)
        assert stored[key].mean == summary.mean and stored[key].m2 == summary.m2


def test_a_store_the_worker_cannot_write_leaves_it_to_the_client(tmp_path: Path) -> None:
    test, ref = tile_pair(tmp_path)
    blocked = tmp_path / "not_a_folder"
    blocked.write_text("a file where the store should be")
    result = audit_and_store(test, [ref], [], TileOptions(), summaries_to=str(blocked))
    assert result.status == OK and not result.summaries_stored
    assert result.summary.count == 40 * 50


def test_without_a_store_nothing_is_written(tmp_path: Path) -> None:
    test, ref = tile_pair(tmp_path)
    result = audit_and_store(test, [ref], [], TileOptions())
    assert result.status == OK and not result.summaries_stored


def test_a_store_removed_meanwhile_is_not_made_again(tmp_path: Path) -> None:
    # a job dismissed (or failed) while this tile ran has removed its staged folder: the worker
    # must not recreate results.zarr there (the folder would be left behind)
    test, ref = tile_pair(tmp_path)
    gone = tmp_path / "out.partial-run" / "results.zarr.partial"
    result = audit_and_store(test, [ref], [], TileOptions(), summaries_to=str(gone))
    assert result.status == OK and not result.summaries_stored
    assert not (tmp_path / "out.partial-run").exists()


def test_the_worker_works_out_the_tile_statistics_the_client_would(tmp_path: Path) -> None:
    from dataclasses import replace

    from demaudit.workers.outputs.tile_records import computed_record
    from demaudit.workers.stats.summary import statistics

    test, ref = tile_pair(tmp_path)
    result = audit_and_store(test, [ref], [], TileOptions())
    assert result.statistics == statistics(result.summary)
    assert result.statistics["count"] == 40 * 50
    by_client = computed_record(replace(result, statistics=None), test, [ref.tile_id])
    assert computed_record(result, test, [ref.tile_id]).stats == by_client.stats


def _store_with_overview(folder: Path, test: TileInfo) -> ResultsStore:
    layout = overview_layout([test], factor=5)
    return ResultsStore(folder, layout)


def test_the_worker_writes_the_overview_block_the_client_would(tmp_path: Path) -> None:
    import zarr

    test, ref = tile_pair(tmp_path)
    by_worker = _store_with_overview(tmp_path / "worker", test)
    by_client = _store_with_overview(tmp_path / "client", test)
    options = TileOptions(overview_factor=5)
    result = audit_and_store(
        test, [ref], [], options, overview_to=by_worker.overview_target(test.tile_id)
    )
    assert result.status == OK and result.overview_stored and result.overview is None
    by_client.write_overview(test.tile_id, audit_tile(test, [ref], [], options).overview)
    worker_block = zarr.open_array(by_worker.overview_target(test.tile_id).array_path)[:]
    client_block = zarr.open_array(by_client.overview_target(test.tile_id).array_path)[:]
    assert worker_block.shape == (8, 10) and np.isfinite(worker_block).all()
    np.testing.assert_array_equal(worker_block, client_block)


def test_an_overview_store_removed_meanwhile_is_not_made_again(tmp_path: Path) -> None:
    import shutil

    test, ref = tile_pair(tmp_path)
    store = _store_with_overview(tmp_path / "out.partial-run", test)
    target = store.overview_target(test.tile_id)
    shutil.rmtree(tmp_path / "out.partial-run")
    result = audit_and_store(test, [ref], [], TileOptions(overview_factor=5), overview_to=target)
    assert result.status == OK and not result.overview_stored and result.overview is not None
    assert not (tmp_path / "out.partial-run").exists()
