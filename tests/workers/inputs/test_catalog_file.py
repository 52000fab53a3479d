"""catalog.json names tiles relative to their data root (or the spec's folder), never by an
absolute server path; read back against the re-check's own folders it gives the same tiles;
older catalogs with absolute paths are still read; entries that cannot be placed are left out,
so those tiles are scanned again."""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest
import rasterio
from rasterio.transform import from_origin

from demaudit.workers.inputs.catalog import TileInfo, scan_tile
from demaudit.workers.inputs.catalog_file import (
    anchor_key,
    catalog_document,
    relative_to_anchor,
    tiles_from_catalog,
)


def _dem(path: Path, value: float = 50.0) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    profile = {
        "driver": "GTiff", "width": 8, "height": 8, "count": 1, "dtype": "float32",
        "crs": "EPSG:32632", "transform": from_origin(480_000, 6_230_000, 5, 5),
    }  # fmt: skip
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(np.full((1, 8, 8), value, dtype="float32"))
    return path


def _scanned(path: Path) -> TileInfo:
    tile = scan_tile(path)
    assert isinstance(tile, TileInfo)
    return tile


@pytest.fixture
def roots(tmp_path: Path) -> tuple[str, str]:
    """Two data roots (resolved), a tile in each."""
    first, second = (tmp_path / "roots" / name for name in ("a", "b"))
    _dem(first / "release" / "E00_N00.tif")
    _dem(second / "reference" / "R00.tif", 48.0)
    return str(first.resolve()), str(second.resolve())


def _strings(value: object) -> list[str]:
    if isinstance(value, dict):
        return [s for v in value.values() for s in _strings(v)]
    if isinstance(value, list):
        return [s for v in value for s in _strings(v)]
    return [value] if isinstance(value, str) else []


def _tiles(roots: tuple[str, str]) -> list[TileInfo]:
    first, second = roots
    paths = (Path(first, "release", "E00_N00.tif"), Path(second, "reference", "R00.tif"))
    return [_scanned(p) for p in paths]


def test_the_document_holds_paths_relative_to_their_data_root(roots, tmp_path: Path):
    document = catalog_document(_tiles(roots), anchors=roots)
    entries = document["tiles"]
    assert [(e["root"], e["path"]) for e in entries] == [  # type: ignore[attr-defined]
        (0, "release/E00_N00.tif"),
        (1, "reference/R00.tif"),
    ]
    text = json.dumps(document)
    assert str(tmp_path) not in text and os.path.realpath(tmp_path) not in text
    assert not any(os.path.isabs(s) for s in _strings(document))
    assert document["roots"] == [anchor_key(r) for r in roots]  # digests, not the folders


def test_read_back_against_the_same_roots_gives_the_same_tiles(roots):
    tiles = _tiles(roots)
    back = tiles_from_catalog(
        json.loads(json.dumps(catalog_document(tiles, anchors=roots))), anchors=roots
    )
    assert back == {t.path: t for t in tiles}
    # the roots listed in another order: each tile is still found in its own root
    swapped = tiles_from_catalog(catalog_document(tiles, anchors=roots), anchors=roots[::-1])
    assert swapped == back


def test_a_spec_naming_files_above_its_folder_is_written_with_dot_dot_steps(tmp_path: Path):
    spec_folder = (tmp_path / "project" / "specs").resolve()
    spec_folder.mkdir(parents=True)
    tile = _scanned(_dem(tmp_path / "archive" / "E00.tif"))
    assert relative_to_anchor(tile.path, [str(spec_folder)]) == (0, "../../archive/E00.tif")
    document = catalog_document([tile], anchors=[str(spec_folder)])
    assert tiles_from_catalog(document, anchors=[str(spec_folder)]) == {tile.path: tile}


def test_an_older_catalog_with_absolute_paths_is_still_read(roots):
    tiles = _tiles(roots)
    document = catalog_document(tiles, anchors=roots)
    del document["roots"]
    for entry, tile in zip(document["tiles"], tiles, strict=True):  # type: ignore[call-overload]
        del entry["root"]
        entry["path"] = tile.path  # as catalogs were written before
    back = tiles_from_catalog(document, anchors=("/elsewhere",))
    assert back == {t.path: t for t in tiles}


def test_entries_that_cannot_be_placed_are_left_out(roots, tmp_path: Path):
    tiles = _tiles(roots)
    document = catalog_document(tiles, anchors=roots)
    # another root in place of the first (the service's roots changed): its tile is left out
    other = str((tmp_path / "other").resolve())
    assert set(tiles_from_catalog(document, anchors=(other, roots[1]))) == {tiles[1].path}
    assert tiles_from_catalog(document, anchors=(other,)) == {}
    entries: list[dict] = document["tiles"]  # type: ignore[assignment]
    damaged = [
        entries[0] | {"root": 7},  # no such root
        entries[0] | {"path": tiles[0].path},  # an absolute path where a relative one belongs
        {k: v for k, v in entries[1].items() if k != "fingerprint"},  # a field missing
        entries[1] | {"crs": "zero"},
    ]
    assert tiles_from_catalog(document | {"tiles": damaged}, anchors=roots) == {}
    assert tiles_from_catalog(document | {"tiles": [*damaged, entries[1]]}, anchors=roots) == {
        tiles[1].path: tiles[1]
    }
