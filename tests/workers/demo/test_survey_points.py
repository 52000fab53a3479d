"""The demo archive's checkpoints (workers/demo/survey_points.py)."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import rasterio

from demaudit.workers.demo.archive import clean_options
from demaudit.workers.demo.options import NODATA, DemoArchiveOptions, LandCover, tile_layout
from demaudit.workers.demo.surface import true_terrain
from demaudit.workers.demo.survey_points import checkpoint_count, checkpoints
from demaudit.workers.demo.world import build_world
from tests.support.demo_files import TINY


def _read_checkpoints(path: Path) -> tuple[list[str], list[dict[str, str]]]:
    lines = path.read_text().splitlines()
    comments = [line for line in lines if line.startswith("#")]
    rows = list(csv.DictReader(line for line in lines if not line.startswith("#")))
    return comments, rows


def test_checkpoints_file(archive: Path) -> None:
    comments, rows = _read_checkpoints(archive / "checkpoints.csv")
    header = "\n".join(comments)
    for text in ("EPSG:5773", "EGM96", "EPSG:32632", "metre", "# survey_rmse_m: 0.02"):
        assert text in header
    assert list(rows[0]) == ["id", "easting", "northing", "height", "landcover"]
    assert len(rows) == 20 and len({row["id"] for row in rows}) == 20
    release = {p.stem: p for p in (archive / "release_2026_11").glob("*.tif")}
    grid = tile_layout(DemoArchiveOptions(**TINY))
    for row in rows:
        easting, northing = float(row["easting"]), float(row["northing"])
        assert 480_000 < easting < 480_400 and 6_229_600 < northing < 6_230_000
        assert row["landcover"] in {"1", "2", "3"}
        with rasterio.open(release[grid.tile_id(*grid.tile_of(easting, northing))]) as src:
            value = next(src.sample([(easting, northing)]))[0]
        assert value != NODATA


def test_clean_checkpoints_are_the_terrain(clean_archive: Path) -> None:
    comments, rows = _read_checkpoints(clean_archive / "checkpoints.csv")
    assert "# survey_rmse_m: 0.0" in comments
    world = build_world(clean_options(**TINY))
    easting = np.array([float(row["easting"]) for row in rows])
    northing = np.array([float(row["northing"]) for row in rows])
    heights = np.array([float(row["height"]) for row in rows])
    np.testing.assert_allclose(heights, true_terrain(world, easting, northing), atol=5e-4)


def test_checkpoint_count_scales_with_area() -> None:
    assert checkpoint_count(DemoArchiveOptions()) == 200
    assert checkpoint_count(DemoArchiveOptions(**TINY)) == 20
    assert checkpoint_count(DemoArchiveOptions(tiles_x=12, tiles_y=12)) == 800
    points = checkpoints(build_world(DemoArchiveOptions()))
    assert len(points.ids) == 200
    assert np.mean(points.land_cover == LandCover.OPEN_GROUND) > 0.5
    assert np.any(points.land_cover == LandCover.FOREST)
