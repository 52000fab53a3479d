"""Confined opening: the check is made on the open file, and readers use that same file."""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import numpy as np
import pytest
from rasterio.transform import from_origin

from demaudit.workers.checkpoints.points import read_checkpoints
from demaudit.workers.errors import DataRootError, SpecError, TileReadError
from demaudit.workers.inputs.catalog import ScanFailure, TileInfo, file_fingerprint, scan_tile
from demaudit.workers.inputs.confine import open_confined, read_spec_file, real_roots, shown
from demaudit.workers.inputs.rasters import read_tile
from demaudit.workers.inputs.regions import read_regions


@pytest.fixture
def world(tmp_path: Path) -> tuple[Path, Path]:
    """(root, outside): a data root and a folder beside it, each with a file."""
    root, outside = tmp_path / "root", tmp_path / "outside"
    root.mkdir()
    outside.mkdir()
    (root / "inside.txt").write_bytes(b"inside")
    (outside / "secret.txt").write_bytes(b"secret")
    return root, outside


def test_a_file_inside_is_read_and_hashed_from_one_open_file(world):
    root, _ = world
    roots = real_roots([root])
    with open_confined(root / "inside.txt", roots) as opened:
        assert opened.name == "inside.txt"
        assert opened.read_bytes() == b"inside"
        assert opened.sha256() == hashlib.sha256(b"inside").hexdigest()  # hashlib: the reference
        assert opened.size == 6


def test_a_name_swapped_after_opening_still_reads_the_checked_file(world):
    root, outside = world
    roots = real_roots([root])
    with open_confined(root / "inside.txt", roots) as opened:
        os.replace(root / "inside.txt", root / "moved.txt")
        (root / "inside.txt").symlink_to(outside / "secret.txt")
        assert opened.read_bytes() == b"inside"
        assert opened.sha256() == hashlib.sha256(b"inside").hexdigest()


@pytest.mark.parametrize("how", ["file-link", "folder-link"])
def test_links_leading_out_are_refused_naming_the_file_relative_to_its_root(world, how):
    root, outside = world
    if how == "file-link":
        (root / "tile.tif").symlink_to(outside / "secret.txt")
        path = root / "tile.tif"
    else:
        (root / "sub").symlink_to(outside)
        path = root / "sub" / "secret.txt"
    with pytest.raises(DataRootError) as refused:
        open_confined(path, real_roots([root]))
    message = str(refused.value)
    assert message.startswith(shown(path, real_roots([root])))
    assert str(outside) not in message and str(root) not in message and "/proc" not in message


def test_a_fifo_is_refused_without_blocking(world):
    root, _ = world
    os.mkfifo(root / "pipe.tif")
    with pytest.raises(OSError, match="not a regular file"):
        open_confined(root / "pipe.tif", real_roots([root]))


def test_without_roots_nothing_is_confined_and_paths_show_as_given(world):
    root, outside = world
    (root / "link.txt").symlink_to(outside / "secret.txt")
    with open_confined(root / "link.txt", None) as opened:
        assert opened.read_bytes() == b"secret"
    assert shown(root / "link.txt", None) == str(root / "link.txt")


def test_shown_never_gives_an_absolute_path_with_roots(world):
    root, outside = world
    roots = real_roots([root])
    assert shown(root / "a" / "b.tif", roots) == "a/b.tif"
    assert shown(outside / "secret.txt", roots) == "secret.txt"


def _tif(path: Path) -> Path:
    from tests.conftest import write_tif

    return write_tif(
        path,
        np.full((4, 4), 10.0),
        crs="EPSG:32632",
        transform=from_origin(480_000, 6_230_000, 5.0, 5.0),
    )


def test_tiles_scanned_then_swapped_for_a_link_out_are_refused_when_read(world):
    root, outside = world
    tile = _tif(root / "t.tif")
    _tif(outside / "t.tif")
    roots = real_roots([root])
    scanned = scan_tile(tile, None, roots)
    assert isinstance(scanned, TileInfo) and scanned.roots == roots
    with open(tile, "rb") as fh:
        assert scanned.fingerprint == hashlib.sha256(fh.read()).hexdigest()
    tile.unlink()
    tile.symlink_to(outside / "t.tif")  # swapped after the scan (after acceptance)
    with pytest.raises(DataRootError, match=r"^tile t: t\.tif leads outside"):
        read_tile(scanned)
    failed = scan_tile(tile, None, roots)
    assert isinstance(failed, ScanFailure)
    assert "t.tif leads outside the allowed data roots" in failed.reason
    assert str(outside) not in failed.reason


def test_unreadable_tiles_name_no_server_path(world):
    root, _ = world
    (root / "bad.tif").write_bytes(b"not a tiff at all")
    roots = real_roots([root])
    failed = scan_tile(root / "bad.tif", None, roots)
    assert isinstance(failed, ScanFailure)
    assert "bad.tif" in failed.reason
    assert str(root) not in failed.reason and "/proc/" not in failed.reason
    gone = TileInfo("gone", str(root / "gone.tif"), None, None, "float32", 0, "", 0, roots)  # type: ignore[arg-type]
    with pytest.raises(TileReadError) as refused:
        read_tile(gone)
    assert str(root) not in str(refused.value)


def test_region_and_checkpoint_files_are_read_confined(world):
    root, outside = world
    (outside / "r.geojson").write_text('{"type": "FeatureCollection", "features": []}')
    (outside / "c.csv").write_text("id,easting,northing,height\n1,0,0,1\n")
    (root / "regions.geojson").symlink_to(outside / "r.geojson")
    (root / "points.csv").symlink_to(outside / "c.csv")
    roots = real_roots([root])
    with pytest.raises(DataRootError, match=r"^region\.file: regions\.geojson leads outside"):
        read_regions(root / "regions.geojson", id_property="code", roots=roots)
    with pytest.raises(DataRootError, match=r"^checkpoints\.file: points\.csv leads outside"):
        read_checkpoints(root / "points.csv", roots=roots)
    with pytest.raises(DataRootError):
        file_fingerprint(root / "points.csv", roots=roots)
    with pytest.raises(SpecError) as missing:
        read_checkpoints(root / "none.csv", roots=roots)
    assert "none.csv" in str(missing.value) and str(root) not in str(missing.value)


def test_checkpoint_fingerprint_is_of_the_bytes_read(world):
    root, _ = world
    text = b"id,easting,northing,height\n1,0,0,1\n"
    (root / "c.csv").write_bytes(text)
    data = read_checkpoints(root / "c.csv", roots=real_roots([root]))
    assert data.fingerprint == hashlib.sha256(text).hexdigest()  # hashlib: the reference


def test_a_spec_file_is_read_inside_the_roots_and_refused_outside_naming_the_field(world):
    root, outside = world
    roots = real_roots([root])
    assert read_spec_file(root / "inside.txt", roots, field="region.file") == b"inside"
    (root / "escape.txt").symlink_to(outside / "secret.txt")
    with pytest.raises(DataRootError, match=r"^region\.file: escape\.txt leads outside"):
        read_spec_file(root / "escape.txt", roots, field="region.file")
    with pytest.raises(SpecError, match=r"^checkpoints\.file: cannot read"):
        read_spec_file(root / "missing.csv", roots, field="checkpoints.file")
    with pytest.raises(SpecError, match=r"^checkpoints\.file: cannot read"):
        read_spec_file(root, roots, field="checkpoints.file")  # a folder, not a file


@pytest.mark.parametrize("size", [0, 1, 5_000_003])
def test_the_content_hash_is_sha256_of_the_bytes_whatever_the_size(tmp_path, size):
    # hashlib on the bytes read back is the reference (empty files cannot be mapped)
    data = np.random.default_rng(size).integers(0, 256, size, dtype=np.uint8).tobytes()
    path = tmp_path / "blob.bin"
    path.write_bytes(data)
    with open_confined(path, None) as opened:
        assert opened.sha256() == hashlib.sha256(data).hexdigest()
