"""The GNSS checkpoints of the demo archive: where they are (on land, clear of voids), their
surveyed heights, and the CSV they are written to."""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from demaudit.workers.demo.options import SURVEY_RMSE_M, DemoArchiveOptions, RandomStream, TileGrid
from demaudit.workers.demo.release import VoidDisc, void_discs
from demaudit.workers.demo.surface import land_cover, true_terrain
from demaudit.workers.demo.world import DemoWorld


@dataclass(frozen=True, eq=False)
class Checkpoints:
    """Surveyed points: EPSG:32632 metres, EGM96 orthometric heights in metres, land-cover class."""

    ids: tuple[str, ...]
    easting: np.ndarray
    northing: np.ndarray
    height: np.ndarray
    land_cover: np.ndarray
    survey_rmse_m: float


def survey_rmse(options: DemoArchiveOptions) -> float:
    """Survey error (metres, 1 sigma) of the checkpoints: SURVEY_RMSE_M, none for clean options."""
    return 0.0 if options.clean else SURVEY_RMSE_M


def checkpoint_count(options: DemoArchiveOptions) -> int:
    """200 points for the default 6 x 6 x 160 x 5 m archive, scaled by area, at least 20."""
    area = options.tiles_x * options.tiles_y * (options.pixels * options.pixel_size_m) ** 2
    return max(20, round(200 * area / (36 * 800.0**2)))


_KEEP_CHANCE = np.array([0.0, 1.0, 0.3, 0.5, 0.0])  # by class: mostly open ground, never water


def checkpoints(world: DemoWorld) -> Checkpoints:
    """Checkpoints on land (classes 1-3), inside the domain, clear of the test tiles' voids.

    Positions are rounded to the millimetre before the terrain is evaluated; heights are the true
    terrain plus a normal survey error (sigma SURVEY_RMSE_M, none for clean options).
    """
    options, grid = world.options, world.grid
    rng = np.random.default_rng([options.seed, RandomStream.CHECKPOINTS])
    wanted = checkpoint_count(options)
    margin = 2 * grid.pixel_size_m
    voids: dict[tuple[int, int], tuple[VoidDisc, ...]] = {}
    kept_e: list[float] = []
    kept_n: list[float] = []
    for _ in range(1000):
        easting = np.round(grid.west + rng.uniform(margin, grid.width_m - margin, wanted), 3)
        northing = np.round(grid.north - rng.uniform(margin, grid.height_m - margin, wanted), 3)
        chance = _KEEP_CHANCE[land_cover(world, easting, northing)]
        lucky = rng.random(wanted) < chance
        for e, n in zip(easting[lucky], northing[lucky], strict=True):
            if len(kept_e) < wanted and not _in_void(grid, options, voids, float(e), float(n)):
                kept_e.append(float(e))
                kept_n.append(float(n))
        if len(kept_e) == wanted:
            break
    if len(kept_e) < wanted:
        raise ValueError("no room for the checkpoints: the domain is water or void everywhere")
    easting, northing = np.array(kept_e), np.array(kept_n)
    sigma = survey_rmse(options)
    height = true_terrain(world, easting, northing) + sigma * rng.standard_normal(wanted)
    return Checkpoints(
        ids=tuple(f"cp{i + 1:04d}" for i in range(wanted)),
        easting=easting,
        northing=northing,
        height=height,
        land_cover=land_cover(world, easting, northing),
        survey_rmse_m=sigma,
    )


def _in_void(
    grid: TileGrid,
    options: DemoArchiveOptions,
    cache: dict[tuple[int, int], tuple[VoidDisc, ...]],
    easting: float,
    northing: float,
) -> bool:
    """True if a point lies within two pixels of a void of its test tile."""
    col, row = grid.tile_of(easting, northing)
    discs = cache.setdefault((col, row), void_discs(options, col, row))
    west, north = grid.tile_origin(col, row)
    x = (easting - west) / grid.pixel_size_m
    y = (north - northing) / grid.pixel_size_m
    return any(math.hypot(x - d.col, y - d.row) <= d.radius + 2 for d in discs)


def write_checkpoints(path: Path, world: DemoWorld) -> Checkpoints:
    """Checkpoints CSV: EPSG:32632 metres, EGM96 orthometric heights (EPSG:5773) in metres."""
    points = checkpoints(world)
    with path.open("w", newline="") as stream:
        stream.write(
            "# Valdmark Survey Office GNSS checkpoints (invented demo data)\n"
            "# horizontal_crs: EPSG:32632 (WGS 84 / UTM zone 32N), easting and northing\n"
            "# vertical_datum: EGM96 orthometric height, EPSG:5773\n"
            "# units: metre\n"
            f"# survey_rmse_m: {points.survey_rmse_m}\n"
            "# landcover: 1 open ground, 2 forest, 3 built-up\n"
        )
        writer = csv.writer(stream, lineterminator="\n")
        writer.writerow(["id", "easting", "northing", "height", "landcover"])
        columns = (points.ids, points.easting, points.northing, points.height, points.land_cover)
        for name, easting, northing, height, cover in zip(*columns, strict=True):
            writer.writerow(
                [name, f"{easting:.3f}", f"{northing:.3f}", f"{height:.3f}", int(cover)]
            )
    return points
