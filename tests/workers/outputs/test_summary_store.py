"""Stored summaries: a tile's entries and the job's totals come back as written."""

from __future__ import annotations

import math
import shutil

import numpy as np
import pytest
import zarr
from zarr.codecs import BloscCodec

from demaudit.workers.outputs.layout import ALL_PART, TILE_SUMMARIES_GROUP
from demaudit.workers.outputs.summary_store import (
    TileSummaryStore,
    open_store_group,
    read_job_totals,
    split_after,
    write_entries,
    write_job_totals,
)
from demaudit.workers.stats.merge import JobAccumulator, keyed_summaries
from demaudit.workers.stats.summary import DhSummary, statistics, summarise
from demaudit.workers.tile.task import OK, TileResult


def result(tile_id: str, rng: np.random.Generator, *, regions: int = 2) -> TileResult:
    dh = rng.normal(0.1, 0.4, 5000)
    dh[:10] += rng.uniform(5, 30, 10)
    parts = np.array_split(dh, regions)
    return TileResult(
        tile_id,
        OK,
        None,
        summary=summarise(dh),
        regions={f"R{i}": summarise(p) for i, p in enumerate(parts)},
        strata={"*": {"slope:0-5": summarise(parts[0])}},
        excluded=7,
    )


def test_job_totals_round_trip(tmp_path):
    rng = np.random.default_rng(2)
    acc = JobAccumulator(region_ids=["R0", "R1"])
    for i in range(5):
        acc.add(result(f"t{i}", rng, regions=2 if i else 1))  # keys appear as tiles arrive
    path = tmp_path / "results.zarr"
    zarr.open_group(str(path), mode="w", zarr_format=3)
    write_job_totals(path, ALL_PART, acc)
    back = read_job_totals(path, ALL_PART, ["R0", "R1"])
    assert back is not None and back.excluded == acc.excluded == 35
    assert back.totals().keys() == acc.totals().keys()
    for key, want in acc.totals().items():
        assert statistics(back.summary(key)) == statistics(want)
    table = back.extremes().to_arrays()
    assert table["tiles"] == [f"t{i}" for i in range(5)]
    # sparse: tile 0 had no region R1, so it has one row fewer than the others
    rows_per_tile = np.bincount(table["tile"])  # type: ignore[call-overload]
    assert rows_per_tile[0] == rows_per_tile[1] - 1
    assert back.extremes().tiles_with(("R1", "")) == 4
    assert back.extremes().of(("*", "")) == acc.extremes().of(("*", ""))
    assert not math.isinf(back.extremes().of(("*", ""))[0])
    assert read_job_totals(path, "after", []) is None


def test_linked_tiles_read_back_and_the_source_stays_untouched(tmp_path):
    rng = np.random.default_rng(4)
    first, second = tmp_path / "a.zarr", tmp_path / "b.zarr"
    source = TileSummaryStore(first, mode="a")
    for i in range(3):
        source.write(f"t{i}", keyed_summaries(result(f"t{i}", rng)), excluded=i)
    stored = first / TILE_SUMMARIES_GROUP
    before = {p: p.read_bytes() for p in stored.rglob("*") if p.is_file()}
    target = TileSummaryStore(second, mode="a")
    target.link_from(first, ["t0", "t2"])
    # rewriting a linked tile in the new store must not change the old store's files
    target.write("t2", keyed_summaries(result("t2", rng)), excluded=9)
    assert {p: p.read_bytes() for p in stored.rglob("*") if p.is_file()} == before
    entries, excluded = target.read("t0")
    want, _ = source.read("t0")
    assert excluded == 0 and entries.keys() == want.keys()
    assert all(statistics(entries[k]) == statistics(want[k]) for k in want)
    assert target.read("t2")[1] == 9
    assert sorted(target._parent.group_keys()) == ["t0", "t2"]


def test_split_after_separates_corrected_entries():
    s = summarise(np.arange(5.0))
    own, after = split_after({("*", ""): s, ("after:*", ""): s, ("after:R1", "x"): s})
    assert list(own) == [("*", "")] and list(after) == [("*", ""), ("R1", "x")]


def test_job_totals_that_do_not_add_up_are_refused(tmp_path):
    rng = np.random.default_rng(5)
    acc = JobAccumulator()
    acc.add(result("t0", rng))
    path = tmp_path / "results.zarr"
    zarr.open_group(str(path), mode="w", zarr_format=3)
    write_job_totals(path, ALL_PART, acc)
    table = zarr.open_array(str(path / "job_summaries" / ALL_PART / "histograms"), mode="r+")
    table[1, 0] = table[1, 0] + 1  # a damaged store: one count too many
    with pytest.raises(ValueError, match="do not add up"):
        read_job_totals(path, ALL_PART, [])


def test_an_entry_shared_by_two_keys_is_stored_once_and_read_back_for_both(tmp_path):
    rng = np.random.default_rng(7)
    whole = summarise(rng.normal(0.0, 0.5, 4000))
    other = summarise(rng.normal(1.0, 0.5, 1000))
    entries = {("*", ""): whole, ("R0", ""): whole, ("R1", ""): other}
    path = tmp_path / "results.zarr"
    store = TileSummaryStore(path, mode="a")
    store.write("t0", entries, excluded=3)
    table = zarr.open_array(str(path / TILE_SUMMARIES_GROUP / "t0" / "histograms"), mode="r")
    assert table.shape == (2, whole.bins.size + other.bins.size)  # the shared one once
    assert table.dtype == np.int32
    back, excluded = store.read("t0")
    assert excluded == 3 and list(back) == list(entries)
    for key, want in entries.items():
        got = back[key]
        assert np.array_equal(got.bins, want.bins) and np.array_equal(got.counts, want.counts)
        assert (got.count, got.mean, got.m2) == (want.count, want.mean, want.m2)


def test_stores_written_with_two_arrays_are_still_read(tmp_path):
    # the layout before one "histograms" array: "bins" (int32) and "counts" (int64) beside
    rng = np.random.default_rng(8)
    s = summarise(rng.normal(0.0, 0.5, 3000))
    path = tmp_path / "results.zarr"
    TileSummaryStore(path, mode="a")
    group = zarr.open_group(str(path / TILE_SUMMARIES_GROUP), mode="r+").create_group("old")
    group.create_array("bins", data=s.bins.astype(np.int32), chunks=(s.bins.size,))
    group.create_array("counts", data=s.counts.astype(np.int64), chunks=(s.counts.size,))
    record = {"area": "*", "stratum": "", "count": s.count, "mean": s.mean, "m2": s.m2}
    record |= {"min": s.minimum, "max": s.maximum, "offset": 0, "length": int(s.bins.size)}
    group.attrs.update({"entries": [record], "excluded": 0})
    back, _ = TileSummaryStore(path).read("old")
    assert np.array_equal(back[("*", "")].counts, s.counts) and back[("*", "")].count == s.count


def test_a_tile_written_again_is_replaced_whole(tmp_path):
    rng = np.random.default_rng(9)
    path = tmp_path / "results.zarr"
    store = TileSummaryStore(path, mode="a")
    store.write("t0", keyed_summaries(result("t0", rng, regions=3)), excluded=5)
    again = {("*", ""): summarise(rng.normal(0.0, 0.2, 500))}
    store.write("t0", again, excluded=1)  # fewer entries, a shorter table
    back, excluded = store.read("t0")
    assert excluded == 1 and list(back) == [("*", "")]
    assert np.array_equal(back[("*", "")].counts, again[("*", "")].counts)
    folder = path / TILE_SUMMARIES_GROUP / "t0"
    assert sorted(p.name for p in folder.iterdir()) == ["histograms", "zarr.json"]


def test_the_histograms_array_is_the_one_zarr_makes_itself(tmp_path):
    # write_entries makes the array from a metadata document; it must be what zarr.create_array
    # writes for the same shape, chunks and codec (int32 and, for huge counts, int64)
    rng = np.random.default_rng(10)
    small = summarise(rng.normal(0.0, 0.5, 3000))
    huge = DhSummary(2**31, 0.0, 1.0, -1.0, 1.0, small.bins, small.counts.astype(np.int64) * 2**31)
    path = tmp_path / "results.zarr"
    store = TileSummaryStore(path, mode="a")
    for tile_id, s in (("small", small), ("huge", huge), ("empty", summarise(np.zeros(0)))):
        store.write(tile_id, {("*", ""): s})
        stored = zarr.open_array(str(path / TILE_SUMMARIES_GROUP / tile_id / "histograms"))
        table = np.stack([s.bins, s.counts]).astype(stored.dtype)
        assert np.array_equal(stored[...], table)
        assert stored.dtype == (np.int64 if s is huge else np.int32)
        own = zarr.create_array(
            zarr.storage.MemoryStore(),
            shape=table.shape,
            dtype=table.dtype,
            chunks=(2, max(table.shape[1], 1)),
            compressors=BloscCodec(cname="lz4", clevel=1, shuffle="shuffle"),
            chunk_key_encoding={"name": "default", "separator": "."},
        )
        assert stored.metadata.to_dict() == own.metadata.to_dict()


@pytest.mark.parametrize("wide", [False, True])
def test_a_tile_written_as_files_is_byte_for_byte_what_zarr_writes(tmp_path, wide):
    # TileSummaryStore.write bypasses zarr's store layer; zarr itself (create_hierarchy and
    # the array's codec pipeline, through write_entries) must write the very same files
    rng = np.random.default_rng(11)
    entries = keyed_summaries(result("t0", rng, regions=3))
    if wide:  # counts beyond int32: the int64 table
        s = entries[("*", "")]
        big = s.counts.astype(np.int64) * 2**31
        entries[("*", "")] = DhSummary(
            int(big.sum()), s.mean, s.m2, s.minimum, s.maximum, s.bins, big
        )
    own, theirs = tmp_path / "own.zarr", tmp_path / "zarr.zarr"
    TileSummaryStore(own, mode="a").write("t0", entries, excluded=4)
    parent = open_store_group(theirs, TILE_SUMMARIES_GROUP, mode="a")
    write_entries(parent, "t0", entries, {"excluded": 4})

    def files(root):
        folder = root / TILE_SUMMARIES_GROUP / "t0"
        found = (f for f in folder.rglob("*") if f.is_file())
        return {str(f.relative_to(folder)): f.read_bytes() for f in found}

    mine = files(own)
    assert sorted(mine) == ["histograms/c.0.0", "histograms/zarr.json", "zarr.json"]
    assert mine == files(theirs)
    back, excluded = TileSummaryStore(own).read("t0")
    assert excluded == 4 and back.keys() == entries.keys()
    for key, s in entries.items():
        assert np.array_equal(back[key].counts, s.counts) and back[key].count == s.count


def test_a_tile_is_not_written_into_a_store_removed_meanwhile(tmp_path):
    path = tmp_path / "results.zarr"
    store = TileSummaryStore(path, mode="a")
    shutil.rmtree(path)  # a failed job removed its partial store while a worker still ran
    with pytest.raises(FileNotFoundError):
        store.write("t0", {("*", ""): summarise(np.ones(3))})
    assert not path.exists()


def test_a_tile_whose_histograms_are_lost_does_not_read_as_zero_counts(tmp_path):
    # an overwrite cut short (or a chunk lost) must not give a re-check a tile of empty
    # histograms with full counts: reading it fails, and the re-check recomputes (reuse.py)
    rng = np.random.default_rng(12)
    path = tmp_path / "results.zarr"
    store = TileSummaryStore(path, mode="a")
    store.write("t0", keyed_summaries(result("t0", rng)), excluded=2)
    (path / TILE_SUMMARIES_GROUP / "t0" / "histograms" / "c.0.0").unlink()
    with pytest.raises(ValueError, match="t0"):
        store.read("t0")


def test_rewriting_a_tile_removes_its_group_document_first(tmp_path, monkeypatch):
    # a removal cut short leaves no group behind (has() False), never a group without its data
    rng = np.random.default_rng(13)
    path = tmp_path / "results.zarr"
    store = TileSummaryStore(path, mode="a")
    store.write("t0", keyed_summaries(result("t0", rng)))

    def cut_short(folder, *args, **kwargs):
        raise OSError("disk gone")

    monkeypatch.setattr(shutil, "rmtree", cut_short)
    with pytest.raises(OSError):
        store.write("t0", keyed_summaries(result("t0", rng)))
    assert not store.has("t0")
