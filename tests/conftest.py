"""Shared fixtures: tiny GeoTIFF archives built in place, and one local Dask cluster per session."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path

import numpy as np
import pytest
import rasterio
from pyproj import Transformer
from rasterio.transform import from_origin

UTM32 = "EPSG:32632"
LAEA = "EPSG:3035"


INTEGRATION = Path(__file__).resolve().parent / "integration"


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    """Every test under tests/integration is marked ``integration`` (real processes)."""
    for item in items:
        if INTEGRATION in Path(item.path).resolve().parents:
            item.add_marker(pytest.mark.integration)


def terrain(e: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Smooth synthetic terrain (metres, orthometric) as a function of UTM 32N coordinates."""
    return (
        50.0
        + 0.01 * (e - 480_000)
        + 8.0 * np.sin((e - 480_000) / 150.0) * np.cos((n - 6_229_000) / 210.0)
    )


def write_tif(path: Path, data: np.ndarray, *, crs: str | None, transform, nodata=-9999.0) -> Path:
    profile = {
        "driver": "GTiff",
        "height": data.shape[0],
        "width": data.shape[1],
        "count": 1,
        "dtype": "float32",
        "transform": transform,
        "nodata": nodata,
    }
    if crs is not None:
        profile["crs"] = crs
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data.astype(np.float32), 1)
    return path


def _grid_centres(transform, shape):
    rows, cols = np.mgrid[0 : shape[0], 0 : shape[1]]
    x, y = rasterio.transform.xy(transform, rows.ravel(), cols.ravel())
    return np.asarray(x).reshape(shape), np.asarray(y).reshape(shape)


@pytest.fixture
def tif_writer() -> Callable[..., Path]:
    """write_tif(path, data, *, crs, transform, nodata=-9999.0) as a fixture."""
    return write_tif


@pytest.fixture
def make_archive(tmp_path: Path) -> Callable[..., Path]:
    """Build a tiny archive: test tiles (UTM 32N, 5 m, ellipsoidal = terrain + N + bias) and
    reference tiles (EPSG:3035, 4 m, EGM96 orthometric, other tiling). Returns the folder."""

    def build(
        *, tiles: int = 2, pixels: int = 40, bias: float = 0.25, seed: int = 0, noise: float = 0.0
    ) -> Path:
        from demaudit.workers.tile.datum import geoid_undulation

        rng = np.random.default_rng(seed)
        root = tmp_path / "archive"
        (root / "test").mkdir(parents=True)
        (root / "ref").mkdir()
        to_lonlat = Transformer.from_crs(UTM32, "EPSG:4326", always_xy=True)
        side = pixels * 5.0
        for r in range(tiles):
            for c in range(tiles):
                transform = from_origin(480_000 + c * side, 6_230_000 - r * side, 5.0, 5.0)
                e, n = _grid_centres(transform, (pixels, pixels))
                lon, lat = to_lonlat.transform(e, n)
                undulation = geoid_undulation(lon, lat, vertical_crs="EPSG:5773")
                h = terrain(e, n) + undulation + bias + rng.normal(0, noise, e.shape) * (noise > 0)
                write_tif(root / "test" / f"t_{c}_{r}.tif", h, crs=UTM32, transform=transform)
        # reference: one grid in EPSG:3035 covering the test domain with a margin, 3 x 3 tiles
        to_laea = Transformer.from_crs(UTM32, LAEA, always_xy=True)
        xs, ys = to_laea.transform(
            [480_000 - 50, 480_000 + tiles * side + 50],
            [6_230_000 + 50, 6_230_000 - tiles * side - 50],
        )
        corners = [
            to_laea.transform(e, n)
            for e in (479_950, 480_050 + tiles * side)
            for n in (6_230_050, 6_229_950 - tiles * side)
        ]
        left = min(p[0] for p in corners) - 20
        top = max(p[1] for p in corners) + 20
        width = max(p[0] for p in corners) + 20 - left
        height = top - (min(p[1] for p in corners) - 20)
        ref_px = int(np.ceil(max(width, height) / 4.0 / 3))
        to_utm = Transformer.from_crs(LAEA, UTM32, always_xy=True)
        for r in range(3):
            for c in range(3):
                transform = from_origin(left + c * ref_px * 4.0, top - r * ref_px * 4.0, 4.0, 4.0)
                x, y = _grid_centres(transform, (ref_px, ref_px))
                e, n = to_utm.transform(x, y)
                write_tif(
                    root / "ref" / f"ref_{c}_{r}.tif", terrain(e, n), crs=LAEA, transform=transform
                )
        regions = {
            "type": "FeatureCollection",
            "features": [
                _square_feature(
                    "WEST",
                    to_lonlat,
                    480_000 - 10,
                    480_000 + side * tiles / 2 + 7,
                    6_230_000 - tiles * side - 10,
                    6_230_000 + 10,
                ),
                _square_feature(
                    "EAST",
                    to_lonlat,
                    480_000 + side * tiles / 2 + 7,
                    480_000 + side * tiles + 10,
                    6_230_000 - tiles * side - 10,
                    6_230_000 + 10,
                ),
                _square_feature("FAR", to_lonlat, 600_000, 601_000, 6_000_000, 6_001_000),
            ],
        }
        import json

        (root / "regions.geojson").write_text(json.dumps(regions))
        (root / "job.yaml").write_text(
            "name: tiny\n"
            "test: {tiles: test/*.tif, vertical_crs: ellipsoidal, units: metre}\n"
            "reference: {tiles: ref, vertical_crs: 'EPSG:5773', units: metre}\n"
            "region: {file: regions.geojson, id_property: code}\n"
        )
        return root

    return build


def _square_feature(code: str, to_lonlat, e0: float, e1: float, n0: float, n1: float) -> dict:
    ring_e = np.array([e0, e1, e1, e0, e0])
    ring_n = np.array([n0, n0, n1, n1, n0])
    lon, lat = to_lonlat.transform(ring_e, ring_n)
    return {
        "type": "Feature",
        "properties": {"code": code, "name": code.title()},
        "geometry": {"type": "Polygon", "coordinates": [list(zip(lon, lat, strict=True))]},
    }


@pytest.fixture(scope="session")
def dask_client() -> Iterator[object]:
    """One embedded LocalCluster (2 worker processes) for the whole session."""
    from demaudit.service.run.cluster import dask_client as open_client

    with open_client(None, workers=2, memory_limit="2GiB") as client:
        yield client
