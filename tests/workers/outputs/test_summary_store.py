"""Stored summaries: a tile's entries and the job's totals come back as written."""

from __future__ import annotations

import math

import numpy as np
import pytest
import zarr

from demaudit.workers.outputs.layout import ALL_PART, TILE_SUMMARIES_GROUP
from demaudit.workers.outputs.summary_store import (
    TileSummaryStore,
    read_job_totals,
    split_after,
    write_job_totals,
)
from demaudit.workers.stats.merge import JobAccumulator, keyed_summaries
from demaudit.workers.stats.summary import statistics, summarise
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
    counts = zarr.open_array(str(path / "job_summaries" / ALL_PART / "counts"), mode="r+")
    counts[0] = counts[0] + 1  # a damaged store
    with pytest.raises(ValueError, match="do not add up"):
        read_job_totals(path, ALL_PART, [])
