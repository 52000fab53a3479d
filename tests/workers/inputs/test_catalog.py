"""The catalog's scan: rasters that cannot be elevation (or land cover) are refused with the
reason; integer single-band DEMs and palette land cover are accepted; an earlier fingerprint is
reused only for a file whose whole stamp (size, mtime, ctime, inode) is unchanged."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import rasterio
from rasterio.enums import ColorInterp
from rasterio.transform import from_origin

from demaudit.workers.inputs.catalog import (
    ScanFailure,
    TileInfo,
    scan_landcover_tile,
    scan_tile,
    unchanged,
)
from demaudit.workers.inputs.catalog_file import catalog_document, tiles_from_catalog

UTM32 = "EPSG:32632"


def _raster(
    path: Path,
    *,
    bands: int = 1,
    dtype: str = "uint8",
    colorinterp: list[ColorInterp] | None = None,
    colormap: bool = False,
) -> Path:
    profile = {
        "driver": "GTiff",
        "height": 8,
        "width": 8,
        "count": bands,
        "dtype": dtype,
        "crs": UTM32,
        "transform": from_origin(500_000, 6_000_000, 5.0, 5.0),
    }
    if bands == 3 and colorinterp is not None:
        profile["photometric"] = "RGB"
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(np.full((bands, 8, 8), 7).astype(dtype))
        if colorinterp is not None:
            dst.colorinterp = colorinterp
        if colormap:
            dst.write_colormap(1, {0: (0, 0, 0, 255), 7: (0, 128, 0, 255)})
    return path


def test_an_rgb_orthophoto_is_not_a_dem(tmp_path: Path):
    rgb = [ColorInterp.red, ColorInterp.green, ColorInterp.blue]
    found = scan_tile(_raster(tmp_path / "ortho.tif", bands=3, colorinterp=rgb))
    assert isinstance(found, ScanFailure)
    assert found.reason == (
        "tile ortho.tif holds 3 bands (red, green, blue) of uint8: not an elevation model, "
        "which has one band; it was not used"
    )


def test_several_bands_without_colours_are_not_a_dem(tmp_path: Path):
    found = scan_tile(_raster(tmp_path / "two.tif", bands=2, dtype="float32"))
    assert isinstance(found, ScanFailure) and "2 bands" in found.reason


def test_a_palette_raster_is_not_a_dem_but_may_be_land_cover(tmp_path: Path):
    path = _raster(tmp_path / "classes.tif", colormap=True)
    found = scan_tile(path)
    assert isinstance(found, ScanFailure) and "palette" in found.reason
    assert isinstance(scan_landcover_tile(path), TileInfo)


def test_a_single_red_band_is_an_image(tmp_path: Path):
    found = scan_tile(_raster(tmp_path / "red.tif", colorinterp=[ColorInterp.red]))
    assert isinstance(found, ScanFailure) and "(an image)" in found.reason


@pytest.mark.parametrize("dtype", ["uint8", "int16", "uint16", "float32"])
def test_single_band_integer_and_float_dems_are_accepted(tmp_path: Path, dtype: str):
    found = scan_tile(_raster(tmp_path / "dem.tif", dtype=dtype))
    assert isinstance(found, TileInfo) and found.dtype == dtype


def test_a_multiband_land_cover_is_refused(tmp_path: Path):
    rgb = [ColorInterp.red, ColorInterp.green, ColorInterp.blue]
    found = scan_landcover_tile(_raster(tmp_path / "map.tif", bands=3, colorinterp=rgb))
    assert isinstance(found, ScanFailure) and "not a land-cover raster" in found.reason


# --- overlapping test tiles: each ground pixel once, in the first-listed tile ---------------


def _tile(path: Path, *, left: float, top: float, size: int = 20, crs: str = UTM32) -> TileInfo:
    with rasterio.open(
        path,
        "w",
        driver="GTiff",
        height=size,
        width=size,
        count=1,
        dtype="float32",
        crs=crs,
        transform=from_origin(left, top, 5.0, 5.0),
    ) as dst:
        dst.write(np.full((1, size, size), 100.0, dtype="float32"))
    found = scan_tile(path)
    assert isinstance(found, TileInfo)
    return found


def test_a_copy_is_superseded_and_a_half_overlap_is_masked(tmp_path: Path):
    from demaudit.workers.inputs.catalog import covered_mask, overlap_cautions, tile_overlaps

    first = _tile(tmp_path / "a.tif", left=500_000, top=6_000_000)
    copy = _tile(tmp_path / "a_copy.tif", left=500_000, top=6_000_000)
    half = _tile(tmp_path / "b.tif", left=500_050, top=6_000_000)  # 10 of 20 columns over 'a'
    beside = _tile(tmp_path / "c.tif", left=500_100, top=6_000_000)  # touches 'a' only
    overlaps = tile_overlaps([first, copy, half, beside])
    assert set(overlaps) == {"a_copy", "b", "c"}
    assert overlaps["a_copy"].superseded and overlaps["a_copy"].covered_px == 400
    b = overlaps["b"]
    assert not b.superseded and b.covered_px == 200
    assert [f.tile_id for f in b.covered] == ["a", "a_copy"]
    mask = covered_mask(half.grid, b.covered)
    assert mask[:, :10].all() and not mask[:, 10:].any()
    # 'c' touches 'a' and 'a_copy' but overlaps only the later-listed 'b' (its left half)
    assert [f.tile_id for f in overlaps["c"].covered] == ["b"]
    assert overlaps["c"].covered_px == 200
    (caution,) = overlap_cautions(overlaps)
    assert "3 test tile(s) overlap earlier-listed test tiles" in caution
    assert "a_copy: 400 of 400 pixels in a (status superseded)" in caution
    assert "b: 200 of 400 pixels in a, a_copy" in caution


def test_listing_order_decides_who_counts(tmp_path: Path):
    from demaudit.workers.inputs.catalog import tile_overlaps

    one = _tile(tmp_path / "one.tif", left=500_000, top=6_000_000)
    two = _tile(tmp_path / "two.tif", left=500_000, top=6_000_000)
    assert set(tile_overlaps([one, two])) == {"two"}
    assert set(tile_overlaps([two, one])) == {"one"}


def test_overlaps_across_crs_follow_the_reprojected_footprint(tmp_path: Path):
    from pyproj import Transformer

    from demaudit.workers.inputs.catalog import covered_mask, tile_overlaps

    utm = _tile(tmp_path / "utm.tif", left=500_000, top=6_000_000, size=40)
    to_laea = Transformer.from_crs(UTM32, "EPSG:3035", always_xy=True)
    x, y = to_laea.transform(500_100.0, 6_000_000.0)  # top-left at the UTM tile's column 20
    laea = _tile(tmp_path / "laea.tif", left=x, top=y, size=40, crs="EPSG:3035")
    overlap = tile_overlaps([utm, laea])["laea"]
    mask = covered_mask(laea.grid, overlap.covered)
    # independent check: each LAEA pixel centre taken to UTM (pyproj) and tested against the
    # UTM tile's bounds
    cols, rows = np.meshgrid(np.arange(40) + 0.5, np.arange(40) + 0.5)
    a, _, c, _, e, f = laea.grid.transform
    east, north = Transformer.from_crs("EPSG:3035", UTM32, always_xy=True).transform(
        c + cols * a, f + rows * e
    )
    left, bottom, right, top = utm.bounds
    inside = (east > left) & (east < right) & (north > bottom) & (north < top)
    assert 300 < inside.sum() < 1300 and not overlap.superseded
    assert np.count_nonzero(mask != inside) <= 2  # pixels whose centre is on the edge itself


def test_same_file_names_in_two_folders_get_unique_ids(tmp_path: Path):
    from demaudit.workers.inputs.catalog import ScanFailure, unique_tile_ids

    (tmp_path / "first").mkdir()
    (tmp_path / "again").mkdir()
    a = _tile(tmp_path / "first" / "t_0_0.tif", left=500_000, top=6_000_000)
    b = _tile(tmp_path / "again" / "t_0_0.tif", left=500_000, top=6_000_000)
    c = _tile(tmp_path / "first" / "t_1_0.tif", left=500_100, top=6_000_000)
    gone = ScanFailure("t_1_0", str(tmp_path / "again" / "t_1_0.tif"), "unreadable")
    ids = [t.tile_id for t in unique_tile_ids([a, b, c, gone])]
    assert ids == ["t_0_0@first", "t_0_0@again", "t_1_0@first", "t_1_0@again"]
    assert [t.tile_id for t in unique_tile_ids([a, c])] == ["t_0_0", "t_1_0"]


# --- re-check: when an earlier scan's fingerprint is reused ----------------------------------


def _dem_of(path: Path, height: float) -> Path:
    """An uncompressed 8 x 8 float32 DEM: any heights give the same file size."""
    profile = {
        "driver": "GTiff", "height": 8, "width": 8, "count": 1, "dtype": "float32",
        "crs": UTM32, "transform": from_origin(500_000, 6_000_000, 5.0, 5.0),
    }  # fmt: skip
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(np.full((1, 8, 8), height, dtype="float32"))
    return path


def _sha256(path: Path) -> str:
    import hashlib

    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_an_unchanged_file_keeps_the_earlier_fingerprint_without_hashing(tmp_path: Path):
    path = _dem_of(tmp_path / "dem.tif", 50.0)
    first = scan_tile(path)
    assert isinstance(first, TileInfo) and first.fingerprint == _sha256(path)
    again = scan_tile(path, (first.stamp, "e" * 64))  # a marker no hash can give
    assert isinstance(again, TileInfo) and again.fingerprint == "e" * 64
    assert unchanged(first, path)


def test_a_rewrite_with_the_same_size_and_the_old_mtime_put_back_is_hashed_again(tmp_path):
    import os
    import time

    path = _dem_of(tmp_path / "dem.tif", 50.0)
    first = scan_tile(path)
    assert isinstance(first, TileInfo)
    time.sleep(0.05)  # past the file system clock's tick (coarse, a few ms), as for any later edit
    _dem_of(path, 51.0)  # new content, same size
    os.utime(path, ns=(path.stat().st_atime_ns, first.mtime_ns))  # `touch -d`, `cp -p`
    stat = path.stat()
    assert (stat.st_size, stat.st_mtime_ns) == (first.size_bytes, first.mtime_ns)  # the old check
    assert not unchanged(first, path)
    again = scan_tile(path, (first.stamp, first.fingerprint))
    assert isinstance(again, TileInfo)
    assert again.fingerprint == _sha256(path) != first.fingerprint


def test_a_catalog_written_without_ctime_and_inode_has_its_tiles_hashed_again(tmp_path: Path):
    path = _dem_of(tmp_path / "dem.tif", 50.0)
    first = scan_tile(path)
    assert isinstance(first, TileInfo)
    anchors = (str(tmp_path.resolve()),)
    document = catalog_document([replace(first, fingerprint="e" * 64)], anchors=anchors)
    assert tiles_from_catalog(document, anchors=anchors)[str(path)].fingerprint == "e" * 64
    current = tiles_from_catalog(document, anchors=anchors)[str(path)]
    assert unchanged(current, path)  # today's catalog: the marker would be reused
    for entry in document["tiles"]:  # type: ignore[attr-defined]
        del entry["ctime_ns"], entry["inode"]  # as catalogs were written before
    old = tiles_from_catalog(document, anchors=anchors)[str(path)]
    assert (old.size_bytes, old.mtime_ns) == (first.size_bytes, first.mtime_ns)
    assert not unchanged(old, path)
    again = scan_tile(path, (old.stamp, old.fingerprint))
    assert isinstance(again, TileInfo) and again.fingerprint == _sha256(path)
    assert again.stamp == current.stamp  # the new catalog records the whole stamp
