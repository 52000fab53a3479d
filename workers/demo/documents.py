"""The documents of the demo archive: provinces (GeoJSON), the truth file naming every injected
error (JSON), the README and the demo job spec (YAML)."""

from __future__ import annotations

import json
from dataclasses import asdict
from pathlib import Path
from typing import Any

import numpy as np
import pyproj
import shapely

from demaudit.workers.demo.options import (
    BLUNDER_RANGE_M,
    CANOPY_RANGE_M,
    NODATA,
    PROVINCES,
    ROOF_RANGE_M,
    TEST_CRS,
    DemoArchiveOptions,
    LandCover,
    tilted_tiles,
)
from demaudit.workers.demo.survey_points import Checkpoints
from demaudit.workers.demo.tile_files import ReleaseSummary
from demaudit.workers.demo.world import DemoWorld, province_geometries


def write_provinces(path: Path, world: DemoWorld) -> None:
    """Provinces as a GeoJSON FeatureCollection in EPSG:4326 (lon, lat; RFC 7946 winding)."""
    to_lonlat = pyproj.Transformer.from_crs(TEST_CRS, "EPSG:4326", always_xy=True)

    def lonlat(xy: np.ndarray) -> np.ndarray:
        lon, lat = to_lonlat.transform(xy[:, 0], xy[:, 1])
        return np.round(np.column_stack([lon, lat]), 7)

    features = []
    for code, geometry in province_geometries(world).items():
        shape = shapely.orient_polygons(shapely.transform(geometry, lonlat))
        features.append(
            {
                "type": "Feature",
                "properties": {"code": code, "name": PROVINCES[code]},
                "geometry": shapely.geometry.mapping(shape),
            }
        )
    collection = {"type": "FeatureCollection", "features": features}
    path.write_text(json.dumps(collection, separators=(",", ":")) + "\n")


def write_truth(
    path: Path,
    world: DemoWorld,
    release: ReleaseSummary,
    reference: dict[str, Any],
    points: Checkpoints,
) -> None:
    """Every injected parameter, so that tests can check what the audit recovers."""
    options = world.options
    truth = {
        "scenario": "Valdmark Survey Office, release 2026-11 vs lidar 2021 (invented)",
        "seed": options.seed,
        "tiles": {"x": options.tiles_x, "y": options.tiles_y},
        "pixels": options.pixels,
        "test": _test_release(world),
        "reference": reference,
        "geoid": {
            "model": "EGM96",
            "grid": "egm96_15.gtx",
            "vertical_crs": "EPSG:5773",
            "to": "EPSG:4979",
        },
        **_injected_errors(world, release),
        "landcover": {
            "classes": {c.name.lower(): int(c) for c in LandCover},
            "nodata": 0,
            "frame": "what the test tiles show (moves with the shift)",
        },
        "checkpoints": {"count": len(points.ids), "survey_rmse_m": points.survey_rmse_m},
        "options": asdict(options),
    }
    path.write_text(json.dumps(truth, indent=2) + "\n")


def _test_release(world: DemoWorld) -> dict[str, Any]:
    """The test release's grid and datum."""
    options, grid = world.options, world.grid
    return {
        "crs": TEST_CRS,
        "vertical_crs": "ellipsoidal (WGS 84, EPSG:4979)",
        "pixel_size_m": options.pixel_size_m,
        "tile_size_m": grid.tile_size_m,
        "domain_west_m": grid.west,
        "domain_north_m": grid.north,
        "domain_east_m": grid.west + grid.width_m,
        "domain_south_m": grid.north - grid.height_m,
        "nodata": NODATA,
    }


def _injected_errors(world: DemoWorld, release: ReleaseSummary) -> dict[str, Any]:
    """The errors injected into the test release, in the truth file's order (shift to update)."""
    options, grid = world.options, world.grid
    return {
        "shift": {"east_m": options.shift_east_m, "north_m": options.shift_north_m},
        "vertical_bias_m": options.vertical_bias_m,
        "canopy": {
            "enabled": options.canopy,
            "forest_m": list(CANOPY_RANGE_M),
            "roof_m": list(ROOF_RANGE_M),
        },
        "noise": {
            "sigma_m": options.noise_sigma_m,
            "slope_factor": options.noise_slope_factor,
            "model": "sigma = sigma_m + slope_factor * tan(slope); 0 when sigma_m is 0",
        },
        "blunders": {
            "fraction": options.blunder_fraction,
            "range_m": list(BLUNDER_RANGE_M),
            "count": release.blunders,
        },
        "voids": {
            "patches_per_10_tiles": options.void_patches,
            "count": len(release.voids),
            "discs": release.voids,
        },
        "tilt": {
            "m_per_km": options.tilt_m_per_km,
            "tiles": [grid.tile_id(col, row) for col, row in tilted_tiles(options)],
            "rises_towards": "east",
            "zero_at_easting_m": grid.west,
        },
        "update": {"written": options.write_update, "tiles": release.update_tiles},
    }


def write_readme(path: Path, options: DemoArchiveOptions) -> None:
    path.write_text(
        "# Demo archive (invented data)\n\n"
        "A made-up audit case of the Valdmark Survey Office: the photogrammetric surface model\n"
        "release 2026-11 (`release_2026_11/`, WGS 84 / UTM 32N, ellipsoidal heights) against the\n"
        "2021 lidar terrain model (`lidar_2021/`, ETRS89-LAEA, EGM96 heights), with land cover,\n"
        "provinces (`provinces.geojson`), GNSS checkpoints (`checkpoints.csv`), the corrected\n"
        "tiles of the nightly update (`release_2026_11_update/`) and the injected errors\n"
        "(`truth.json`). Nothing here describes a real place or agency.\n\n"
        "Audit it with the job spec `demo.yaml`. Made with:\n\n"
        f"    demaudit make-demo-archive --out DIR --tiles {options.tiles_x}x{options.tiles_y}"
        f" --pixels {options.pixels} --seed {options.seed}\n"
    )


SPEC = """\
name: release-2026-11
test:
  tiles: release_2026_11/*.tif
  vertical_crs: ellipsoidal
  units: metre
reference:
  tiles: lidar_2021/*.tif
  vertical_crs: EPSG:5773
  units: metre
checkpoints:
  file: checkpoints.csv
  vertical_crs: EPSG:5773
  units: metre
region:
  file: provinces.geojson
  id_property: code
landcover:
  tiles: landcover/*.tif
  classes:
    1: {name: open ground, group: non_vegetated}
    2: {name: forest, group: vegetated}
    3: {name: built-up, group: non_vegetated}
    4: {name: water, group: excluded}
strata:
  slope_bands_deg: [0, 5, 15, 30, 45]
outliers:
  rule: nmad
  factor: 5
grading:
  standards: [nssda, asprs2014, asprs2023, quality_level]
  asprs_class_cm: 10
  quality_level: QL2
options:
  resampling: bilinear
"""
