"""Tile records: the typed entry of summary.json tiles[] round-trips a baseline's entry, and
the cautions on tiles left out of the statistics."""

from __future__ import annotations

from demaudit.workers.outputs.tile_records import (
    TileRecord,
    coverage_cautions,
    empty_statistics,
    failed_record,
)

SHIFT = {"status": "ok", "east_m": 1.0, "north_m": 2.0, "applied": True}


def test_entries_round_trip_in_order_with_unknown_keys_kept():
    full = {
        "tile": "t1",
        "status": "ok",
        "reason": "why",
        "bounds": [0.0, 1.0, 2.0, 3.0],
        "fingerprint": "abc",
        "stats": {"count": 5},
        "coregistration": SHIFT,
        "stats_after_coregistration": {"count": 5},
        "sources": ["reference:r1"],
        "later_section": {"x": 1},
    }
    failed = {"tile": "t2", "status": "failed", "reason": "unreadable", "stats": {"count": 0}}
    for entry in (full, failed):
        again = TileRecord.from_document(entry).document()
        assert list(again.items()) == list(entry.items())


def test_a_failed_tile_has_empty_statistics_and_no_footprint():
    record = failed_record("t3", "cannot open")
    assert record.document() == {
        "tile": "t3",
        "status": "failed",
        "reason": "cannot open",
        "stats": empty_statistics(),
    }


def test_coverage_cautions_list_at_most_five_tiles_per_status():
    tiles = [TileRecord(f"t{i}", "no_reference", {}) for i in range(7)]
    tiles += [TileRecord("v", "no_valid_pixels", {}), TileRecord("ok", "ok", {})]
    out = coverage_cautions(tiles)
    assert len(out) == 2
    assert out[0].startswith("7 of 9 test tiles are not in the statistics: no reference tile")
    assert out[0].endswith("(status no_reference: t0, t1, t2, t3, t4, ...)")
    assert out[1].endswith("(status no_valid_pixels: v)")
    assert coverage_cautions([TileRecord("ok", "ok", {})]) == []
