"""The demo archive's documents: provinces, the job spec, the truth file
(workers/demo/documents.py)."""

from __future__ import annotations

import json
from dataclasses import asdict
from pathlib import Path

import numpy as np
import pyproj
import shapely
import yaml
from shapely.geometry import shape

from demaudit.workers.demo.archive import make_demo_archive
from demaudit.workers.demo.options import PROVINCES, DemoArchiveOptions
from demaudit.workers.demo.world import build_world, province_index
from demaudit.workers.spec import parse_spec, resolve
from tests.support.demo_files import TINY


def test_provinces(archive: Path) -> None:
    collection = json.loads((archive / "provinces.geojson").read_text())
    features = {f["properties"]["code"]: f for f in collection["features"]}
    assert {code: f["properties"]["name"] for code, f in features.items()} == PROVINCES
    assert features["TC"]["geometry"]["type"] == "MultiPolygon"
    assert features["HF"]["geometry"]["type"] == "Polygon"
    assert len(features["HF"]["geometry"]["coordinates"]) == 2  # outer ring and one hole
    shapes = {code: shape(f["geometry"]) for code, f in features.items()}
    assert all(s.is_valid for s in shapes.values())
    to_lonlat = pyproj.Transformer.from_crs(32632, 4326, always_xy=True)
    lon, lat = to_lonlat.transform([480_000, 480_400], [6_229_600, 6_230_000])
    domain = shapely.box(lon[0], lat[0], lon[1], lat[1])
    union = shapely.union_all(list(shapes.values()))
    assert union.intersection(domain).area > 0.8 * domain.area
    # the quadrants follow the terrain layout: SU north-west ... TC south-east
    world = build_world(DemoArchiveOptions(**TINY))
    for index, (code, easting, northing) in enumerate(
        [("SU", 480_050, 6_229_950), ("EW", 480_350, 6_229_950), ("HF", 480_050, 6_229_650)]
    ):
        assert province_index(world, np.array(easting), np.array(northing)) == index
        lon_lat = to_lonlat.transform(easting, northing)
        assert shapes[code].contains(shapely.Point(lon_lat))


def test_job_spec(archive: Path) -> None:
    data = yaml.safe_load((archive / "demo.yaml").read_text())
    job = resolve(parse_spec(data), base_dir=archive)
    assert job.spec.name == "release-2026-11"
    assert (job.spec.test.vertical_crs, job.spec.reference.vertical_crs) == (
        "ellipsoidal",
        "EPSG:5773",
    )
    assert job.test_tiles and job.reference_tiles and job.landcover_tiles
    assert job.spec.landcover is not None
    groups = {v: c.group for v, c in job.spec.landcover.classes.items()}
    assert groups == {1: "non_vegetated", 2: "vegetated", 3: "non_vegetated", 4: "excluded"}
    assert make_demo_archive.__defaults__ == (DemoArchiveOptions(),)


def test_truth_file(archive: Path) -> None:
    truth = json.loads((archive / "truth.json").read_text())
    assert truth["shift"] == {"east_m": 1.6, "north_m": -0.9}
    assert truth["vertical_bias_m"] == 0.25
    assert truth["canopy"]["forest_m"] == [6.0, 20.0] and truth["canopy"]["roof_m"] == [6.0, 15.0]
    assert truth["noise"]["sigma_m"] == 0.3 and truth["noise"]["slope_factor"] == 0.5
    assert truth["blunders"]["fraction"] == 0.01 and truth["blunders"]["range_m"] == [5.0, 50.0]
    assert truth["blunders"]["count"] > 0
    assert truth["voids"]["patches_per_10_tiles"] == 20
    assert truth["tilt"]["m_per_km"] == 1.0
    assert sorted(truth["tilt"]["tiles"]) == sorted(truth["update"]["tiles"])
    assert len(truth["tilt"]["tiles"]) == 4
    assert truth["reference"]["crs"] == "EPSG:3035" and truth["reference"]["noise_sigma_m"] == 0.03
    assert truth["reference"]["pixel_size_m"] == 4.0
    assert truth["test"]["crs"] == "EPSG:32632" and truth["test"]["pixel_size_m"] == 5.0
    assert truth["seed"] == 1 and truth["tiles"] == {"x": 2, "y": 2} and truth["pixels"] == 40
    assert truth["options"] == asdict(DemoArchiveOptions(**TINY, void_patches=20))
