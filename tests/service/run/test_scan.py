"""Tile scans in a re-check: what an older catalog accepted is checked again by today's header
checks (an RGB image accepted before those checks existed is refused now)."""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin

from demaudit.service.run.scan import _scan, batch_size, local_map
from demaudit.workers.inputs.catalog import ScanFailure, TileInfo, call_each, scan_tile
from demaudit.workers.inputs.catalog_file import HEADER_CHECKS, catalog_document, headers_checked


def _rgb(path: Path) -> Path:
    profile = {
        "driver": "GTiff", "width": 8, "height": 8, "count": 3, "dtype": "uint8",
        "crs": "EPSG:32632", "transform": from_origin(480_000, 6_230_000, 5, 5),
        "photometric": "RGB",
    }  # fmt: skip
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(np.full((3, 8, 8), 120, dtype="uint8"))
    return path


def _dem(path: Path) -> Path:
    profile = {
        "driver": "GTiff", "width": 8, "height": 8, "count": 1, "dtype": "float32",
        "crs": "EPSG:32632", "transform": from_origin(480_000, 6_230_000, 5, 5),
    }  # fmt: skip
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(np.full((1, 8, 8), 50.0, dtype="float32"))
    return path


def _as_old_catalog_saw_it(image: Path, like: TileInfo) -> TileInfo:
    """The record an older scan (without the band checks) kept of this file."""
    stat = image.stat()
    return replace(
        like, path=str(image), size_bytes=stat.st_size, mtime_ns=stat.st_mtime_ns,
        ctime_ns=stat.st_ctime_ns, inode=stat.st_ino, fingerprint="f" * 64,
    )  # fmt: skip


def test_an_image_an_older_catalog_accepted_is_refused_when_its_headers_were_not_checked(
    tmp_path,
):
    image = _rgb(tmp_path / "ortho.tif")
    dem = scan_tile(_dem(tmp_path / "dem.tif"))
    assert isinstance(dem, TileInfo)
    known = {str(image): _as_old_catalog_saw_it(image, dem)}
    # an up-to-date catalog's unchanged tile is taken as it is, without opening the file ...
    ok, failed = _scan(local_map, [image], known, known)
    assert [t.path for t in ok] == [str(image)] and not failed
    # ... but one written before today's header checks is opened again and the image refused
    ok, failed = _scan(local_map, [image], known, {})
    assert not ok
    assert isinstance(failed[0], ScanFailure) and "3 bands" in failed[0].reason


def test_catalog_documents_say_which_header_checks_they_passed(tmp_path):
    dem = scan_tile(_dem(tmp_path / "dem.tif"))
    assert isinstance(dem, TileInfo)
    document = catalog_document([dem], anchors=(str(tmp_path),))
    assert document["header_checks"] == HEADER_CHECKS and headers_checked(document)
    del document["header_checks"]  # a catalog written before the checks existed
    assert not headers_checked(document)


@pytest.mark.parametrize(
    ("calls", "workers", "want"),
    [(0, 2, 1), (1, 2, 1), (8, 2, 1), (9, 2, 2), (128, 2, 16), (10_000, 2, 16), (40, 8, 2)],
)
def test_scan_batches_keep_every_worker_busy_and_stay_small(calls, workers, want):
    size = batch_size(calls, workers=workers)
    assert size == want
    if calls >= 4 * workers and size < 16:  # about 4 tasks per worker (ceil: at least 2)
        assert -(-calls // size) >= 2 * workers


def test_call_each_keeps_the_order_of_the_calls():
    assert call_each(pow, [(2, 3), (3, 2), (10, 0)]) == [8, 9, 1]
