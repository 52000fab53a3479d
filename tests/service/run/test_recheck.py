"""A re-check reads its baseline's catalog.json against its own folders: tiles it can place
and whose files are unchanged are not opened again; tiles it cannot place are scanned again."""

from __future__ import annotations

import json
import shutil
from dataclasses import replace
from pathlib import Path

import numpy as np
import rasterio
from rasterio.transform import from_origin

from demaudit.service.run.recheck import Baseline, change_report
from demaudit.service.run.scan import _scan
from demaudit.workers.inputs.catalog import TileInfo, scan_tile
from demaudit.workers.inputs.catalog_file import catalog_document
from demaudit.workers.inputs.confine import real_roots, shown
from demaudit.workers.outputs.layout import CATALOG_NAME
from demaudit.workers.recheck.plan import ChangePlan, Thresholds

MARKER = "e" * 64  # a fingerprint no file has: it comes back only when the entry is reused


def _dem(path: Path) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    profile = {
        "driver": "GTiff", "width": 8, "height": 8, "count": 1, "dtype": "float32",
        "crs": "EPSG:32632", "transform": from_origin(480_000, 6_230_000, 5, 5),
    }  # fmt: skip
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(np.full((1, 8, 8), 50.0, dtype="float32"))
    return path


def _mapper(function, *arguments):  # the scan on this thread, hashing included
    return list(map(function, *arguments))


def _baseline(folder: Path, tile: TileInfo, anchor: Path) -> Baseline:
    """A baseline folder whose catalog.json holds tile with the MARKER fingerprint."""
    folder.mkdir()
    document = catalog_document([replace(tile, fingerprint=MARKER)], anchors=[str(anchor)])
    (folder / CATALOG_NAME).write_text(json.dumps(document), encoding="utf-8")
    return Baseline(folder, {})


def test_an_unchanged_tile_of_the_baseline_is_not_opened_again(tmp_path: Path):
    archive = (tmp_path / "archive").resolve()
    tile = scan_tile(_dem(archive / "release" / "E00.tif"))
    assert isinstance(tile, TileInfo)
    baseline = _baseline(tmp_path / "base", tile, archive)
    assert str(archive) not in (tmp_path / "base" / CATALOG_NAME).read_text(encoding="utf-8")
    known = baseline.catalog(anchors=[str(archive)])
    assert set(known) == {tile.path} and baseline.catalog_headers_checked
    ok, _ = _scan(_mapper, [Path(tile.path)], known, known)
    assert [t.fingerprint for t in ok] == [MARKER]  # taken from the catalog, file not hashed


def test_an_archive_moved_with_its_spec_is_scanned_again_not_reused(tmp_path: Path):
    """Renamed, the files keep their inodes and sizes, but the catalog's entries name a folder
    the re-check does not have: they are left out and the files are hashed again."""
    old = (tmp_path / "old").resolve()
    tile = scan_tile(_dem(old / "E00.tif"))
    assert isinstance(tile, TileInfo)
    baseline = _baseline(tmp_path / "base", tile, old)
    new = tmp_path / "new"
    shutil.move(old, new)
    known = baseline.catalog(anchors=[str(new.resolve())])
    assert known == {}
    ok, _ = _scan(_mapper, [new.resolve() / "E00.tif"], known, known)
    assert [t.fingerprint for t in ok] == [tile.fingerprint] != [MARKER]


def test_a_baseline_without_a_readable_catalog_knows_no_tile(tmp_path: Path):
    folder = tmp_path / "base"
    folder.mkdir()
    assert Baseline(folder, {}).catalog(anchors=[str(tmp_path)]) == {}
    (folder / CATALOG_NAME).write_text("[1, 2]", encoding="utf-8")  # JSON, but not a catalog
    baseline = Baseline(folder, {})
    assert baseline.catalog(anchors=[str(tmp_path)]) == {}
    assert not baseline.catalog_headers_checked


def test_the_change_report_names_the_baseline_without_its_server_folder(tmp_path: Path):
    """With data roots (the service) the baseline, a results folder outside them, is named by
    its folder's name (the job id), as paths are shown everywhere (confine.shown)."""
    folder = tmp_path / "results" / "job-1234"
    before = {"job": {"finished": "2026-11-30T02:00:00+00:00"}, "tiles": [], "regions": []}
    after = {"tiles": [], "regions": []}
    baseline, plan, limits = Baseline(folder, before), ChangePlan(), Thresholds()
    roots = real_roots([tmp_path / "data"])
    report = change_report(baseline, plan, after, limits, shown=lambda p: shown(p, roots))
    assert report["baseline"] == "job-1234" and str(tmp_path) not in json.dumps(report)
    # without roots (the CLI) the folder as it was given
    assert change_report(baseline, plan, after, limits)["baseline"] == str(folder)
