"""Overlapping test tiles in the co-registration estimate: a ground pixel is counted once there
too, as in the statistics (catalog.tile_overlaps; the rule is the project's own)."""

from __future__ import annotations

import shutil

from shapely.geometry import box

from demaudit.workers.coregistration.tile import Correction
from demaudit.workers.inputs.catalog import Footprint, scan_tile, tile_overlaps
from demaudit.workers.spec import Coregistration
from demaudit.workers.tile.task import TileOptions, estimate_tile, estimate_tile_shift

OPTIONS = TileOptions(
    reference_vertical_crs="EPSG:5773", coregistration=Coregistration(job_estimate="pooled")
)
AT = Correction()


def test_a_redelivered_copy_gives_no_second_shift_estimate(make_archive):
    root = make_archive(tiles=1, pixels=80, noise=0.1)
    shutil.copy(root / "test" / "t_0_0.tif", root / "test" / "t_0_0_copy.tif")
    original = scan_tile(root / "test" / "t_0_0.tif")
    copy = scan_tile(root / "test" / "t_0_0_copy.tif")
    refs = [scan_tile(p) for p in sorted((root / "ref").glob("*.tif"))]
    covered = tile_overlaps([original, copy])[copy.tile_id].covered

    record = estimate_tile_shift(copy, refs, OPTIONS, [], covered)
    assert record["status"] == "cannot_estimate"
    assert "earlier-listed test tile(s) t_0_0" in record["reason"]
    assert estimate_tile(copy, refs, [], OPTIONS, [], AT, covered) is None
    # without the footprints the same copy adds a second set of equations
    alone = estimate_tile(copy, refs, [], OPTIONS, [], AT)
    assert alone is not None and alone.stable_dh.count > 0


def test_a_partly_covered_tile_adds_only_its_own_pixels(make_archive):
    root = make_archive(tiles=1, pixels=80, noise=0.1)
    tile = scan_tile(root / "test" / "t_0_0.tif")
    refs = [scan_tile(p) for p in sorted((root / "ref").glob("*.tif"))]
    west, south, east, north = tile.bounds
    # the archive's stable pixels (slope 3-70 degrees) lie along this tile's east edge, from
    # its middle southwards: an earlier tile over its southern quarter takes part of them
    half = Footprint("earlier", box(west, south, east, south + (north - south) / 4))
    whole = estimate_tile(tile, refs, [], OPTIONS, [], AT)
    part = estimate_tile(tile, refs, [], OPTIONS, [], AT, (half,))
    assert whole is not None and part is not None
    assert 0 < part.stable_dh.count < whole.stable_dh.count
